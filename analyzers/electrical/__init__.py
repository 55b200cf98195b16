"""analyzers/electrical"""
