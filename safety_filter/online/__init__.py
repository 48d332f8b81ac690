"""online"""
