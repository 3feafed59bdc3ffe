"""Inspect an unseen raw archive and draft its variable map.

:func:`inspect_files` opens NetCDF files read-only (netCDF4, never modified, values read
only for 1-D coordinates) and reports every dimension, variable, size, unit and the time
axis. It then guesses

* the role of each dimension (time, z, y, x) from CF coordinate attributes (``axis``,
  ``standard_name``, ``positive``, ``"UNIT since DATE"`` units) and common names;
* face staggering: of two dimensions with the same role, one with exactly one more point
  than the other holds the cell faces (``z_face``, ``y_face``, ``x_face``); when both have
  coordinates the report says whether the faces bracket the centres;
* which raw variable gives each canonical variable (qc, qv, T, p, w) and what it
  measures (``quantity``), from the CF ``standard_name``, common short and long names and
  the units' dimensionality;
* the optional catalogue variables cloud ice ``qi``, rain water ``qr`` and the wind
  components ``u`` and ``v``, proposed only on good evidence (a standard name, an exact
  short name, or a partial name with a long-name match; or, for u and v, a velocity on
  the staggered x or y dimension), never in place of a required variable; for a field on
  horizontal faces, which side of the centres its faces lie on, from the face coordinate.

:func:`draft_varmap` turns the report into a variable map in the format of
``config/varmaps/*.yaml``, validated with :func:`lesprep.raw.varmap.parse_varmap`.

Conventions
-----------
* Every guess is a proposal with a score and the reasons for it; the report lists the
  runners-up. Names only count in favour of a candidate: units are a filter (a candidate
  whose units have the wrong dimensionality is dropped) and never a match by themselves,
  so a lone ``u`` in m/s is not taken for w.
* A raw variable gives at most one canonical variable (greedy by score).
* CF standard names used (from memory of the CF standard name table):
  ``cloud_liquid_water_mixing_ratio``, ``mass_fraction_of_cloud_liquid_water_in_air``,
  ``humidity_mixing_ratio``, ``specific_humidity``,
  ``mass_fraction_of_water_vapor_in_air``, ``air_temperature``,
  ``air_potential_temperature``, ``air_pressure``, ``upward_air_velocity``,
  ``cloud_ice_mixing_ratio``, ``mass_fraction_of_cloud_ice_in_air``,
  ``rain_water_mixing_ratio``, ``mass_fraction_of_rain_in_air``, ``eastward_wind``,
  ``x_wind``, ``northward_wind``, ``y_wind``.
* A bare ``q`` without other hints is taken for specific humidity, the usual meaning of
  the symbol in meteorology (from memory); the report says so.
* Units missing from the file are written to the draft as the canonical units with a
  ``CHECK`` comment: lesprep never converts silently, so the user must confirm them.
"""

from lesprep.raw.survey.draft import draft_varmap
from lesprep.raw.survey.guess import inspect_files
from lesprep.raw.survey.hints import CANONICAL, MIN_SCORE, OPTIONAL
from lesprep.raw.survey.records import (
    DimInfo,
    InspectReport,
    Proposal,
    TimeAxisInfo,
    VariableInfo,
)

__all__ = [
    "CANONICAL",
    "MIN_SCORE",
    "OPTIONAL",
    "DimInfo",
    "InspectReport",
    "Proposal",
    "TimeAxisInfo",
    "VariableInfo",
    "draft_varmap",
    "inspect_files",
]
