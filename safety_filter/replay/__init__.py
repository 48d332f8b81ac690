"""replay"""
