"""monitor"""
