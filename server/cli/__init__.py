"""server/cli"""
