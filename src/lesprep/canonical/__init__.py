"""canonical"""
