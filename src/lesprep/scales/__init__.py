"""Coarse scales: block moments and their exact merges, patches, and the coarsening of a
canonical store to every scale of a job, z-slab by z-slab.
"""
