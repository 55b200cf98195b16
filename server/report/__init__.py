"""server/report"""
