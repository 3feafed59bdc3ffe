"""``lesprep verify``: checks of a finished results tree, one module per check.

:func:`verify_results` runs them all (:mod:`lesprep.verify.run` describes each check).
"""

from lesprep.verify.findings import CHECKS, Finding, VerifyReport, discover, walk_steps
from lesprep.verify.lineage import working_directory
from lesprep.verify.nonfinite import nonfinite
from lesprep.verify.normalization import json_differences, stats_differences
from lesprep.verify.run import verify_results

__all__ = [
    "CHECKS",
    "Finding",
    "VerifyReport",
    "discover",
    "json_differences",
    "nonfinite",
    "stats_differences",
    "verify_results",
    "walk_steps",
    "working_directory",
]
