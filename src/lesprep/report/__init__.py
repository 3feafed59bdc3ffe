"""The report: figures, scene and baseline tables, and the skill of the baseline cloud
fraction.
"""
