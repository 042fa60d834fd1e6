"""boundary.wire"""
