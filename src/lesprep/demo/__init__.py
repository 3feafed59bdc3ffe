"""Synthetic demo archives: invented LES cases that exercise the workflow.

The data are synthetic (idealised profiles, filtered noise, organised structures, cloud
from a saturation adjustment); nothing scientific should be concluded from them.
"""

from lesprep.demo.cases import DEMO_CASES, GENERATOR_VERSION, SOURCE, DemoCase, demo_case
from lesprep.demo.physics import demo_fields
from lesprep.demo.writers import write_demo_case

__all__ = [
    "DEMO_CASES",
    "GENERATOR_VERSION",
    "SOURCE",
    "DemoCase",
    "demo_case",
    "demo_fields",
    "write_demo_case",
]
