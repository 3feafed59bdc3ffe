"""scales"""
