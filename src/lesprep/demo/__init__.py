"""Synthetic demo archives: invented LES cases that exercise the workflow.

The data are synthetic (idealised profiles, filtered noise, organised structures, cloud
from a saturation adjustment); nothing scientific should be concluded from them.
"""

from lesprep.demo.physics import (
    DEMO_CASES,
    GENERATOR_VERSION,
    SOURCE,
    DemoCase,
    demo_case,
    demo_fields,
    write_demo_case,
)

__all__ = [
    "DEMO_CASES",
    "GENERATOR_VERSION",
    "SOURCE",
    "DemoCase",
    "demo_case",
    "demo_fields",
    "write_demo_case",
]
