"""certification"""
