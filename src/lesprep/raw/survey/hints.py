"""Name, standard-name and unit hints the survey scores raw variables with.

The tables are kept together here so that the variables a draft proposes follow the
variable catalogue (:mod:`lesprep.catalogue`).
"""

from __future__ import annotations

from lesprep import catalogue

CANONICAL = catalogue.required_inputs()
"""The variables a draft proposes (those every variable map must provide)."""
MIN_SCORE = 3.0
"""Name evidence a candidate needs to be proposed (a short-name or long-name match)."""

_STANDARD: dict[str, dict[str, str]] = {
    "qc": {
        "cloud_liquid_water_mixing_ratio": "direct",
        "mass_fraction_of_cloud_liquid_water_in_air": "direct",
    },
    "qv": {
        "humidity_mixing_ratio": "mixing_ratio",
        "specific_humidity": "specific_humidity",
        "mass_fraction_of_water_vapor_in_air": "specific_humidity",
    },
    "T": {"air_temperature": "temperature", "air_potential_temperature": "potential_temperature"},
    "p": {"air_pressure": "direct"},
    "w": {"upward_air_velocity": "direct"},
}


def _words(text: str) -> tuple[str, ...]:
    return tuple(text.split())


# short names (lower case) -> quantity; an exact match scores 6
_SHORT: dict[str, dict[str, str]] = {
    "qc": dict.fromkeys(
        _words("qc ql qcl qlc clw liq qliq cloudwater cloud_water qcloud q_c q_l lwc"), "direct"
    ),
    "qv": {
        **dict.fromkeys(_words("qv vap qvap q_v rv mixr vapour vapor"), "mixing_ratio"),
        **dict.fromkeys(_words("q sphum shum spechum hus sh"), "specific_humidity"),
    },
    "T": {
        **dict.fromkeys(
            _words("t ta temp tabs tempc tempk tk tc temperature air_temperature"), "temperature"
        ),
        **dict.fromkeys(
            _words("theta th pt pot_temp potential_temperature tpot"), "potential_temperature"
        ),
    },
    "p": dict.fromkeys(_words("p pres pressure pref p_ref prs press pa air_pressure"), "direct"),
    "w": dict.fromkeys(
        _words("w wc wf wa ww wwind w_wind wz w_c w_f upward_velocity vertical_velocity"),
        "direct",
    ),
}

# words that rule a candidate out: in the short name's tokens (split at "_", "-", ...)
_EXCLUDE_NAME: dict[str, tuple[str, ...]] = {
    "qc": _words(
        "ice rain snow graupel hail frac fraction cf cover mask lwp path number nc flux var "
        "variance tend rate precip reff qi qr qs qg qt tot total rh"
    ),
    "qv": _words("rh relh qt qsat qs tot total liq ice rain flux var variance tend sat def path"),
    "T": _words(
        "thl thv the thetal thetav thetae theta_l theta_v theta_e thli td dew dewpoint sfc surf "
        "skin sst ts soil tsoil flux var variance tend pert anom prime tv tb mse"
    ),
    "p": _words("pp pert prime anom dyn ps psfc sfc surf tend grad pv e pr prec precip prob var"),
    "w": _words("var variance w2 wvar wskew skew std flux tend max min ls subs wls prime u v"),
}
# ... and in the long name's words
_EXCLUDE_LONG: dict[str, tuple[str, ...]] = {
    "qc": _words(
        "ice rain snow graupel hail fraction cover mask path number concentration flux variance "
        "tendency rate precipitation drizzle radius total relative vapour vapor"
    ),
    "qv": _words(
        "relative total liquid cloud ice rain flux variance tendency saturation deficit path"
    ),
    "T": _words(
        "liquid virtual equivalent dew dewpoint surface skin soil flux variance tendency "
        "perturbation anomaly deviation ice static brightness"
    ),
    "p": _words(
        "perturbation anomaly dynamic deviation surface tendency gradient vapour vapor partial "
        "precipitation probability variance"
    ),
    "w": _words(
        "variance flux tendency subsidence large skewness standard maximum minimum horizontal"
    ),
}

_LONG: dict[str, tuple[tuple[str, float], ...]] = {
    "qc": (("liquid", 3.0), ("cloud", 2.0), ("condensate", 2.0), ("mixing ratio", 1.0)),
    "qv": (("vapour", 3.0), ("vapor", 3.0), ("humidity", 3.0), ("mixing ratio", 1.0)),
    "T": (("potential temperature", 4.0), ("temperature", 3.0)),
    "p": (("pressure", 4.0),),
    "w": (("vertical velocity", 4.0), ("vertical wind", 4.0), ("upward", 3.0)),
}


_PARTIAL: dict[str, tuple[str, ...]] = {
    "qc": ("liq", "cloud", "qc", "ql"),
    "qv": ("vap", "hum", "qv"),
    "T": ("temp", "theta"),
    "p": ("pres",),
    "w": (),
}
"""Substrings of a short name that count as weaker evidence (score 3)."""
