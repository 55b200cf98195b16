"""server/lsp"""
