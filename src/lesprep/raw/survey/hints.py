"""Name, standard-name and unit hints the survey scores raw variables with.

The tables are kept together here so that the variables a draft proposes follow the
variable catalogue (:mod:`lesprep.catalogue`).
"""

from __future__ import annotations

from lesprep import catalogue

CANONICAL = catalogue.required_inputs()
"""The variables a draft always proposes (those every variable map must provide)."""
MIN_SCORE = 3.0
"""Name evidence a candidate needs to be proposed (a short-name or long-name match)."""
OPTIONAL_MIN_SCORE = 6.0
"""Name evidence an optional variable (:data:`OPTIONAL`) needs: a CF standard name, an
exact short name, or a partial name together with a long-name match. A velocity on the
staggered dimension of its own axis is taken without names (see ``guess``)."""

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
    "qi": {
        "cloud_ice_mixing_ratio": "direct",
        "mass_fraction_of_cloud_ice_in_air": "mass_fraction",
    },
    "qr": {"rain_water_mixing_ratio": "direct", "mass_fraction_of_rain_in_air": "mass_fraction"},
    "u": {"eastward_wind": "direct", "x_wind": "direct"},
    "v": {"northward_wind": "direct", "y_wind": "direct"},
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
    "qi": dict.fromkeys(
        _words("qi qice q_i qci ice cloudice cloud_ice ice_mixing_ratio"), "direct"
    ),
    "qr": dict.fromkeys(_words("qr qrain q_r rain rainwater rain_water"), "direct"),
    "u": dict.fromkeys(
        _words("u ua uc uf u_c u_f uvel u_vel uwind u_wind xvel x_wind eastward_wind"),
        "direct",
    ),
    "v": dict.fromkeys(
        _words("v va vc vf v_c v_f vvel v_vel vwind v_wind yvel y_wind northward_wind"),
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
    "qi": _words(
        "snow graupel hail number ni nc frac fraction cf cover mask iwp path flux var variance "
        "tend rate precip sed reff tot total rh sat qs qg liq qc qv"
    ),
    "qr": _words(
        "number nr frac fraction cover mask rwp path flux var variance tend rate precip prec "
        "sed reff tot total surf sfc acc accum qc qv qi"
    ),
    "u": _words(
        "star ustar fric friction sfc surf u2 uu uv uw var variance std skew flux tend max min "
        "ls geo ug prime pert anom stokes v w"
    ),
    "v": _words(
        "star fric friction sfc surf v2 vv uv vw var variance std skew flux tend max min ls "
        "geo vg prime pert anom stokes u w"
    ),
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
    "qi": _words(
        "snow graupel hail number concentration fraction cover mask path flux variance "
        "tendency rate radius total precipitation sedimentation liquid"
    ),
    "qr": _words(
        "number concentration fraction cover mask path flux variance tendency rate radius total "
        "surface accumulated sedimentation"
    ),
    "u": _words(
        "friction variance flux tendency standard skewness maximum minimum geostrophic "
        "perturbation anomaly surface stokes large subsidence"
    ),
    "v": _words(
        "friction variance flux tendency standard skewness maximum minimum geostrophic "
        "perturbation anomaly surface stokes large subsidence"
    ),
}

_LONG: dict[str, tuple[tuple[str, float], ...]] = {
    "qc": (("liquid", 3.0), ("cloud", 2.0), ("condensate", 2.0), ("mixing ratio", 1.0)),
    "qv": (("vapour", 3.0), ("vapor", 3.0), ("humidity", 3.0), ("mixing ratio", 1.0)),
    "T": (("potential temperature", 4.0), ("temperature", 3.0)),
    "p": (("pressure", 4.0),),
    "w": (("vertical velocity", 4.0), ("vertical wind", 4.0), ("upward", 3.0)),
    "qi": (("cloud ice", 4.0), ("ice", 3.0)),
    "qr": (("rain water", 4.0), ("rainwater", 4.0), ("rain", 3.0)),
    "u": tuple(
        (phrase, 4.0)
        for phrase in (
            "eastward",
            "zonal",
            "x wind",
            "x-wind",
            "x velocity",
            "x-velocity",
            "x component",
            "x-component",
            "u velocity",
            "u-velocity",
            "u component",
            "u-component",
        )
    ),
    "v": tuple(
        (phrase, 4.0)
        for phrase in (
            "northward",
            "meridional",
            "y wind",
            "y-wind",
            "y velocity",
            "y-velocity",
            "y component",
            "y-component",
            "v velocity",
            "v-velocity",
            "v component",
            "v-component",
        )
    ),
}


_PARTIAL: dict[str, tuple[str, ...]] = {
    "qc": ("liq", "cloud", "qc", "ql"),
    "qv": ("vap", "hum", "qv"),
    "T": ("temp", "theta"),
    "p": ("pres",),
    "w": (),
    "qi": ("ice", "qi"),
    "qr": ("rain", "qr"),
    "u": ("uvel", "uwind"),
    "v": ("vvel", "vwind"),
}
"""Substrings of a short name that count as weaker evidence (score 3)."""

OPTIONAL = tuple(
    v.name for v in catalogue.variables(kind="mapped") if not v.required and v.name in _SHORT
)
"""Optional catalogue variables a draft proposes when the evidence is good (qi, qr, u, v)."""
PROPOSED = (*CANONICAL, *OPTIONAL)
"""Every variable the survey looks for, required first."""
