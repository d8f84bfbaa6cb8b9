"""products"""
