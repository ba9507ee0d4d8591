"""experiments"""
