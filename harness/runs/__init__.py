"""runs"""
