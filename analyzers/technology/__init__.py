"""analyzers/technology"""
