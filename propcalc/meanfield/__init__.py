"""meanfield"""
