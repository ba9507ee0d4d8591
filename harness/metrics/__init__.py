"""metrics"""
