"""server/config"""
