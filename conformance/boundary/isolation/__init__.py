"""boundary.isolation"""
