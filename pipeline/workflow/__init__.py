"""workflow"""
