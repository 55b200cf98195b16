"""server/child"""
