"""variants"""
