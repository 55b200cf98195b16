"""analyzers/model"""
