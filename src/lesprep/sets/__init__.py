"""sets"""
