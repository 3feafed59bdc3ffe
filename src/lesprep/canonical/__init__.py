"""Canonical fine fields: the ingest of one case's raw archive into its canonical store,
with the fused per-cell diagnostics (rh, cloud mask, liquid water path).
"""
