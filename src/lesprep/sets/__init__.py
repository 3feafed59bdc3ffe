"""Sample sets: whole-case splits, training stores per split and scale, and the train-only
normalization.
"""
