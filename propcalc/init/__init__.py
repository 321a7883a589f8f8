"""init"""
