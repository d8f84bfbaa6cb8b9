"""night"""
