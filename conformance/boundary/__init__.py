"""boundary"""
