"""server/sandbox"""
