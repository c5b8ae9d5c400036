"""Viscosity of media, the Stokes–Einstein relation with intervals, and wall corrections.

Units: temperature in °C at the public boundary (converted to K inside), viscosity in mPa·s, D in µm²/s,
radius and diameter in nm, distances from a wall in µm.

Media accepted by :func:`medium_viscosity_mpa_s` (as a name, a plain dict from YAML, or the validated models
of :mod:`msdkit.config`):

===============================================  ==========================================================
``"water"``                                      IAPWS 2008 via the Pátek et al. (2009) correlation
``"heavy_water"`` (``"d2o"``)                    IAPWS 2020 formulation for D2O at 0.1 MPa
``"saline"`` / ``"pbs"``                         1.02 × water at the same temperature (common practice)
``{glycerol_mass_fraction: 0.4}``                glycerol–water, Cheng (2008)
``{glycerol_volume_fraction: 0.4}``              v/v converted to w/w, Volk & Kähler (2018) densities
``{viscosity_mpa_s: 3.0}``                       fixed viscosity, independent of temperature
``{temperature_c: [...], viscosity_mpa_s: [...]}``  user table, ln η interpolated linearly in 1/T
``{reference_diameter_nm, reference_D_um2_s}``   effective viscosity from beads of known size measured at the
                                                 sample temperature, η = k_B T / (3 π d_ref D_ref)
===============================================  ==========================================================
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import expected_got
from .viscosity import (  # noqa: F401  (re-exported: the public home of these names is msdkit.hydro)
    BOLTZMANN_J_K,
    SALINE_VISCOSITY_RATIO,
    ZERO_CELSIUS_K,
    _check_positive,
    _check_range,
    _kelvin,
    _scalar_or_array,
    bead_calibrated_viscosity_mpa_s,
    glycerol_density_kg_m3,
    glycerol_mass_fraction,
    glycerol_water_density_kg_m3,
    glycerol_water_viscosity_mpa_s,
    heavy_water_density_kg_m3,
    heavy_water_viscosity_mpa_s,
    saline_viscosity_mpa_s,
    table_viscosity_mpa_s,
    water_viscosity_mpa_s,
)

#: Two-sided 95 % normal quantile.
Z95 = 1.959963984540054

# ----------------------------------------------------------------------------------------------------------
# Media
# ----------------------------------------------------------------------------------------------------------
_NAMED_MEDIA = {
    "water": "water", "h2o": "water",
    "heavy_water": "heavy_water", "d2o": "heavy_water", "heavy water": "heavy_water",
    "saline": "saline", "pbs": "saline",
}
#: Keys of the medium forms given as a mapping (one form per set).
MEDIUM_FORMS = {
    "fixed": ("viscosity_mpa_s",),
    "table": ("temperature_c", "viscosity_mpa_s"),
    "glycerol_mass": ("glycerol_mass_fraction",),
    "glycerol_volume": ("glycerol_volume_fraction",),
    "beads": ("reference_diameter_nm", "reference_D_um2_s"),
}
_MEDIUM_HELP = (
    "Use water, heavy_water, saline, pbs, {viscosity_mpa_s: 3.0}, {glycerol_mass_fraction: 0.4}, "
    "{glycerol_volume_fraction: 0.4}, {temperature_c: [20, 30], viscosity_mpa_s: [1.2, 0.9]} or "
    "{reference_diameter_nm: 100, reference_D_um2_s: 4.3}."
)


def medium_spec(medium: Any) -> tuple[str, dict[str, Any]]:
    """Normalise a medium (name, mapping or validated model) to ``(kind, parameters)``.

    ``kind`` is one of water, heavy_water, saline, fixed, table, glycerol_mass, glycerol_volume, beads.
    Raises ValueError naming the accepted forms when the medium is not recognised.
    """
    if hasattr(medium, "model_dump"):
        medium = medium.model_dump()
    if isinstance(medium, str):
        key = medium.strip().lower()
        if key in _NAMED_MEDIA:
            return _NAMED_MEDIA[key], {}
        raise ValueError(expected_got("sample.medium", "a known medium", repr(medium), _MEDIUM_HELP))
    if isinstance(medium, Mapping):
        params = {k: v for k, v in medium.items() if v is not None}
        keys = set(params)
        if keys == {"name"} and isinstance(params["name"], str):
            return medium_spec(params["name"])
        for kind, form in MEDIUM_FORMS.items():
            if keys == set(form):
                if kind == "fixed" and not np.isscalar(params["viscosity_mpa_s"]):
                    raise ValueError(expected_got("sample.medium.viscosity_mpa_s", "one number (mPa·s)",
                                                  params["viscosity_mpa_s"],
                                                  "For a table give temperature_c too."))
                return kind, params
        raise ValueError(expected_got("sample.medium", "one of the medium forms", dict(medium), _MEDIUM_HELP))
    raise ValueError(expected_got("sample.medium", "a name or a mapping", repr(medium), _MEDIUM_HELP))


def medium_viscosity_mpa_s(medium: Any, temperature_c: float) -> float:
    """Viscosity of a medium at a temperature.

    Parameters
    ----------
    medium : str, mapping or msdkit.config medium model
        See the module docstring for the accepted forms.
    temperature_c : float, °C

    Returns
    -------
    float, mPa·s

    Raises
    ------
    ValueError
        Unknown medium, or temperature / fraction outside the medium's valid range (the message names it).

    Examples
    --------
    >>> round(medium_viscosity_mpa_s("water", 20.0), 4)
    1.0016
    >>> medium_viscosity_mpa_s({"viscosity_mpa_s": 3.0}, 37.0)
    3.0
    >>> round(medium_viscosity_mpa_s({"glycerol_mass_fraction": 0.4}, 20.0), 2)
    3.67
    """
    kind, p = medium_spec(medium)
    t = float(temperature_c)
    if kind == "water":
        return float(water_viscosity_mpa_s(t))
    if kind == "heavy_water":
        return float(heavy_water_viscosity_mpa_s(t))
    if kind == "saline":
        return float(saline_viscosity_mpa_s(t))
    if kind == "fixed":
        return float(_check_positive("sample.medium.viscosity_mpa_s", p["viscosity_mpa_s"], "Give mPa·s."))
    if kind == "table":
        return float(table_viscosity_mpa_s(t, table_temperature_c=p["temperature_c"],
                                           table_viscosity_mpa_s=p["viscosity_mpa_s"]))
    if kind == "glycerol_mass":
        return float(glycerol_water_viscosity_mpa_s(t, mass_fraction=p["glycerol_mass_fraction"]))
    if kind == "glycerol_volume":
        return float(glycerol_water_viscosity_mpa_s(t, volume_fraction=p["glycerol_volume_fraction"]))
    return float(bead_calibrated_viscosity_mpa_s(t, reference_diameter_nm=p["reference_diameter_nm"],
                                                 reference_D_um2_s=p["reference_D_um2_s"]))


def medium_label(medium: Any) -> str:
    """Describe a medium and the source of its viscosity in a few plain words, for reports."""
    kind, p = medium_spec(medium)
    return {
        "water": "water (IAPWS 2008)",
        "heavy_water": "heavy water (IAPWS 2020)",
        "saline": "saline/PBS (1.02 × water)",
        "fixed": f"fixed viscosity {p.get('viscosity_mpa_s')} mPa·s",
        "table": "user viscosity table",
        "glycerol_mass": f"glycerol–water {p.get('glycerol_mass_fraction')} w/w (Cheng 2008)",
        "glycerol_volume": f"glycerol–water {p.get('glycerol_volume_fraction')} v/v (Cheng 2008)",
        "beads": f"calibrated with {p.get('reference_diameter_nm')} nm beads",
    }[kind]


def viscosity_temperature_slope_per_k(medium: Any, temperature_c: float) -> float:
    """D ln η / dT of a medium at a temperature, 1/K (0 for a fixed viscosity), by central differences."""
    kind, _ = medium_spec(medium)
    if kind == "fixed":
        return 0.0
    h = 0.01
    t = float(temperature_c)
    try:
        up, lo = medium_viscosity_mpa_s(medium, t + h), medium_viscosity_mpa_s(medium, t - h)
        return (math.log(up) - math.log(lo)) / (2 * h)
    except ValueError:  # at the edge of the valid range: one-sided
        try:
            up = medium_viscosity_mpa_s(medium, t + h)
            return (math.log(up) - math.log(medium_viscosity_mpa_s(medium, t))) / h
        except ValueError:
            lo = medium_viscosity_mpa_s(medium, t - h)
            return (math.log(medium_viscosity_mpa_s(medium, t)) - math.log(lo)) / h


# ----------------------------------------------------------------------------------------------------------
# Stokes–Einstein
# ----------------------------------------------------------------------------------------------------------
# ----------------------------------------------------------------------------------------------------------
# Stokes–Einstein
# ----------------------------------------------------------------------------------------------------------
def stokes_einstein_D_um2_s(radius_nm, *, temperature_c, viscosity_mpa_s):
    """Diffusion coefficient of a sphere from its hydrodynamic radius, D = k_B T / (6 π η r).

    Parameters
    ----------
    radius_nm : float or array, nm
    temperature_c : float, °C
    viscosity_mpa_s : float, mPa·s

    Returns
    -------
    float or array, µm²/s

    References
    ----------
    A. Einstein, Ann. Phys. 17, 549 (1905), doi:10.1002/andp.19053220806.

    Examples
    --------
    >>> round(stokes_einstein_D_um2_s(50.0, temperature_c=25.0, viscosity_mpa_s=0.89002), 4)
    4.9073
    """
    r_m = _check_positive("radius_nm", radius_nm, "Give the hydrodynamic radius in nm.") * 1e-9
    eta = _check_positive("viscosity_mpa_s", viscosity_mpa_s, "Give the medium viscosity in mPa·s.") * 1e-3
    d_m2_s = BOLTZMANN_J_K * _kelvin(temperature_c) / (6.0 * np.pi * eta * r_m)
    out = d_m2_s * 1e12
    return float(out) if np.ndim(out) == 0 else out


def stokes_einstein_radius_nm(D_um2_s, *, temperature_c, viscosity_mpa_s):
    """Hydrodynamic radius of a sphere from its diffusion coefficient, r = k_B T / (6 π η D).

    Non-positive D gives NaN (no physical radius); callers average D before converting.

    Examples
    --------
    >>> round(stokes_einstein_radius_nm(4.9073, temperature_c=25.0, viscosity_mpa_s=0.89002), 2)
    50.0
    """
    d = np.asarray(D_um2_s, dtype=float)
    eta = _check_positive("viscosity_mpa_s", viscosity_mpa_s, "Give the medium viscosity in mPa·s.") * 1e-3
    with np.errstate(divide="ignore", invalid="ignore"):
        r_m = BOLTZMANN_J_K * _kelvin(temperature_c) / (6.0 * np.pi * eta * d * 1e-12)
    r_nm = np.where(d > 0, r_m * 1e9, np.nan)
    return float(r_nm) if r_nm.ndim == 0 else r_nm


def stokes_einstein_diameter_nm(D_um2_s, *, temperature_c, viscosity_mpa_s):
    """Hydrodynamic diameter d = k_B T / (3 π η D); NaN for non-positive D.

    Examples
    --------
    >>> round(stokes_einstein_diameter_nm(4.9073, temperature_c=25.0, viscosity_mpa_s=0.89002), 1)
    100.0
    """
    r = stokes_einstein_radius_nm(D_um2_s, temperature_c=temperature_c, viscosity_mpa_s=viscosity_mpa_s)
    return 2.0 * r


@dataclass(frozen=True)
class HydrodynamicSize:
    """Stokes–Einstein size of a sample with its 95 % interval.

    The interval combines the D interval with the stated temperature SD (through T and the medium's η(T)),
    in quadrature on the log scale, D and T errors taken as independent. Item access (``size["radius_nm"]``)
    works like a dict.
    """

    D_um2_s: float
    D_ci95_um2_s: tuple[float, float]
    D_bulk_um2_s: float  # after the wall correction (= D_um2_s without one)
    radius_nm: float
    radius_ci95_nm: tuple[float, float]
    diameter_nm: float
    diameter_ci95_nm: tuple[float, float]
    temperature_c: float
    temperature_sd_c: float
    viscosity_mpa_s: float
    medium: str
    wall_distance_um: float | None = None

    def __getitem__(self, key: str):
        value = getattr(self, key)
        return list(value) if isinstance(value, tuple) else value

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (non-finite numbers become None)."""
        def clean(v):
            if isinstance(v, tuple):
                return [clean(x) for x in v]
            if isinstance(v, float) and not math.isfinite(v):
                return None
            return v
        return {k: clean(getattr(self, k)) for k in self.__dataclass_fields__}


def stokes_einstein_size(
    D_um2_s: float,
    *,
    temperature_c: float,
    medium: Any = "water",
    D_ci95_um2_s: tuple[float, float] | None = None,
    temperature_sd_c: float = 0.0,
    wall_distance_um: float | None = None,
) -> HydrodynamicSize:
    """Hydrodynamic radius and diameter of a sample with a 95 % interval.

    Parameters
    ----------
    D_um2_s : float, µm²/s
        Sample diffusion coefficient (average D over tracks, not an average of sizes).
    temperature_c : float, °C
    medium : medium, default="water"
        Anything :func:`medium_viscosity_mpa_s` accepts.
    D_ci95_um2_s : (float, float), µm²/s, optional
        95 % interval of D; a lower end ≤ 0 gives an unbounded upper size.
    temperature_sd_c : float, °C, default=0
        1-SD uncertainty of the sample temperature.
    wall_distance_um : float, µm, optional
        Distance of the particle centres from a wall; D is first corrected with Faxén's parallel factor.

    Returns
    -------
    HydrodynamicSize

    Notes
    -----
    d = k_B T / (3 π η(T) D). The temperature contributes SD(ln d) = |1/T − d ln η/dT| σ_T; at 25 °C in water
    1 K gives 2.6 % (METHODS). For bead-calibrated media η ∝ T and the temperature cancels.

    Examples
    --------
    >>> s = stokes_einstein_size(4.9073, temperature_c=25.0, D_ci95_um2_s=(4.8, 5.0))
    >>> round(s.diameter_nm, 1), [round(v, 1) for v in s.diameter_ci95_nm]
    (100.0, [98.1, 102.2])
    """
    visc = medium_viscosity_mpa_s(medium, temperature_c)
    t_sd = float(temperature_sd_c)
    if not (math.isfinite(t_sd) and t_sd >= 0):
        raise ValueError(expected_got("temperature_sd_c", ">= 0 (°C, 1 SD)", temperature_sd_c, "Give an SD."))
    D = float(D_um2_s)
    lo, hi = (D, D) if D_ci95_um2_s is None else (float(D_ci95_um2_s[0]), float(D_ci95_um2_s[1]))
    kw = dict(temperature_c=temperature_c, viscosity_mpa_s=visc)

    def bulk(x: float) -> float:
        if not (math.isfinite(x) and x > 0):
            return math.nan
        if wall_distance_um is None:
            return x
        return float(wall_corrected_D_um2_s(x, wall_distance_um=wall_distance_um, **kw))

    D0, D0_lo, D0_hi = bulk(D), bulk(lo), bulk(hi)
    d = float(stokes_einstein_diameter_nm(D0, **kw)) if math.isfinite(D0) else math.nan
    # size interval from the D interval: high D → small size
    d_lo = float(stokes_einstein_diameter_nm(D0_hi, **kw)) if math.isfinite(D0_hi) else math.nan
    d_hi = float(stokes_einstein_diameter_nm(D0_lo, **kw)) if math.isfinite(D0_lo) else math.inf
    if math.isfinite(d) and d > 0:
        slope = 1.0 / (float(temperature_c) + ZERO_CELSIUS_K) - viscosity_temperature_slope_per_k(medium,
                                                                                                   temperature_c)
        if medium_spec(medium)[0] == "beads":
            slope = 0.0
        z_t = Z95 * abs(slope) * t_sd
        w_lo = math.log(d / d_lo) if math.isfinite(d_lo) and d_lo > 0 else 0.0
        w_hi = math.log(d_hi / d) if math.isfinite(d_hi) else math.inf
        d_lo = d * math.exp(-math.hypot(w_lo, z_t))
        d_hi = d * math.exp(math.hypot(w_hi, z_t)) if math.isfinite(w_hi) else math.inf
    else:
        d_lo = d_hi = math.nan
    return HydrodynamicSize(
        D_um2_s=D, D_ci95_um2_s=(lo, hi), D_bulk_um2_s=D0, radius_nm=d / 2,
        radius_ci95_nm=(d_lo / 2, d_hi / 2), diameter_nm=d, diameter_ci95_nm=(d_lo, d_hi),
        temperature_c=float(temperature_c), temperature_sd_c=t_sd,
        viscosity_mpa_s=float(visc), medium=medium_label(medium),
        wall_distance_um=None if wall_distance_um is None else float(wall_distance_um),
    )


# ----------------------------------------------------------------------------------------------------------
# Walls
# ----------------------------------------------------------------------------------------------------------
def _check_ratio(distance_over_radius) -> np.ndarray:
    x = np.asarray(distance_over_radius, dtype=float)
    if np.any(~(x > 1)):
        raise ValueError(expected_got("wall distance / radius", "> 1 (centre farther than one radius)",
                                      distance_over_radius, "Give the wall-to-centre distance."))
    return x


def faxen_parallel_factor(distance_over_radius):
    """D∥/D₀ for a sphere moving parallel to a plane wall (Faxén).

    Parameters
    ----------
    distance_over_radius : float or array
        h/r, wall-to-centre distance over the sphere radius (> 1).

    Notes
    -----
    D∥/D₀ = 1 − 9/16 (r/h) + 1/8 (r/h)³ − 45/256 (r/h)⁴ − 1/16 (r/h)⁵; accurate to ~1 % for h/r ≳ 1.5.

    References
    ----------
    H. Faxén, Ann. Phys. 68, 89 (1922); J. Happel & H. Brenner, Low Reynolds Number Hydrodynamics (1965).

    Examples
    --------
    >>> round(faxen_parallel_factor(2.0), 4)
    0.7214
    """
    q = 1.0 / _check_ratio(distance_over_radius)
    return _scalar_or_array(1 - 9 / 16 * q + q**3 / 8 - 45 / 256 * q**4 - q**5 / 16)


def brenner_perpendicular_factor(distance_over_radius):
    """D⊥/D₀ for a sphere moving towards a plane wall, Brenner's exact series.

    Notes
    -----
    D₀/D⊥ = (4/3) sinh α Σ_{n≥1} n(n+1)/((2n−1)(2n+3)) [(2 sinh((2n+1)α) + (2n+1) sinh 2α) /
    (4 sinh²((n+½)α) − (2n+1)² sinh² α) − 1], α = arccosh(h/r). Summed until terms fall below 1e-15.

    References
    ----------
    H. Brenner, Chem. Eng. Sci. 16, 242 (1961), doi:10.1016/0009-2509(61)80035-3.

    Examples
    --------
    >>> round(brenner_perpendicular_factor(2.0), 4)
    0.4705
    """
    x = _check_ratio(distance_over_radius)
    shape = x.shape
    a = np.arccosh(np.atleast_1d(x).ravel())
    total = np.zeros_like(a)
    active = np.ones(a.shape, dtype=bool)
    n = 0
    while np.any(active) and n < 200000:
        n += 1
        aa = a[active]
        num = 2 * np.sinh((2 * n + 1) * aa) + (2 * n + 1) * np.sinh(2 * aa)
        den = 4 * np.sinh((n + 0.5) * aa) ** 2 - (2 * n + 1) ** 2 * np.sinh(aa) ** 2
        term = n * (n + 1) / ((2 * n - 1) * (2 * n + 3)) * (num / den - 1)
        total[active] += term
        done = np.abs(term) < 1e-15 * np.abs(total[active])
        idx = np.flatnonzero(active)
        active[idx[done]] = False
    return _scalar_or_array((1.0 / (4.0 / 3.0 * np.sinh(a) * total)).reshape(shape))


def wall_corrected_D_um2_s(D_um2_s, *, wall_distance_um, temperature_c, viscosity_mpa_s,
                           direction: str = "parallel"):
    """Bulk D₀ of spheres whose D was measured at a given distance from a wall.

    Solves D_measured = D₀ f(h / r(D₀)) with r(D₀) the Stokes–Einstein radius and f the Faxén parallel factor
    (xy tracking near a coverslip) or Brenner's perpendicular factor. The left side grows monotonically with
    D₀, so the root is unique; it is found by bisection in ln D₀.

    Parameters
    ----------
    D_um2_s : float or array, µm²/s
    wall_distance_um : float, µm
        Wall-to-centre distance h.
    temperature_c : float, °C
    viscosity_mpa_s : float, mPa·s
    direction : {"parallel", "perpendicular"}, default="parallel"

    Returns
    -------
    float or array, µm²/s
        NaN where D ≤ 0 or not finite, or where no sphere with radius < h fits the measurement.
    """
    h_nm = float(_check_positive("wall_distance_um", wall_distance_um, "Give µm from the wall.")) * 1e3
    if direction not in ("parallel", "perpendicular"):
        raise ValueError(expected_got("direction", "'parallel' or 'perpendicular'", direction,
                                      "xy tracking near a coverslip is parallel."))
    factor = faxen_parallel_factor if direction == "parallel" else brenner_perpendicular_factor
    Dm = np.asarray(D_um2_s, dtype=float)
    flat = Dm.ravel()
    out = np.full(flat.shape, np.nan)
    ok = np.isfinite(flat) & (flat > 0)
    if np.any(ok):
        kw = dict(temperature_c=temperature_c, viscosity_mpa_s=viscosity_mpa_s)
        D_touch = float(stokes_einstein_D_um2_s(h_nm / 1.0001, **kw))  # sphere radius just below h

        def g(D0):
            r = np.asarray(stokes_einstein_radius_nm(D0, **kw))
            return D0 * np.asarray(factor(h_nm / r))

        target = flat[ok]
        lo = np.maximum(target, D_touch)
        hi = np.maximum(target, D_touch) * 1e3
        feasible = g(lo) <= target
        lo_l, hi_l = np.log(lo), np.log(hi)
        for _ in range(80):
            mid = 0.5 * (lo_l + hi_l)
            above = g(np.exp(mid)) > target
            hi_l = np.where(above, mid, hi_l)
            lo_l = np.where(above, lo_l, mid)
        sol = np.exp(0.5 * (lo_l + hi_l))
        out[np.flatnonzero(ok)] = np.where(feasible, sol, np.nan)
    return _scalar_or_array(out.reshape(Dm.shape))
