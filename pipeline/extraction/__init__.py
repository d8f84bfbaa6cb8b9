"""extraction"""
