"""analyzers/layout"""
