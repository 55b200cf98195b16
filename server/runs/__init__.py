"""server/runs"""
