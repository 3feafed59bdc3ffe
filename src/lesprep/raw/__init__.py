"""The raw archive: variable maps, which file holds which variable and time, grid and value
checks, the output-time axis, threaded reads of compressed files, and `lesprep inspect`.
"""
