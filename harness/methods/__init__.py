"""methods"""
