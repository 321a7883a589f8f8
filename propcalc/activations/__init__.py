"""activations"""
