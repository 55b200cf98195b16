"""analyzers/extraction"""
