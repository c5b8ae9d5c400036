"""Viscosity of media and the Stokes–Einstein relation.

Units: temperature in °C at the public boundary (converted to K inside), viscosity in mPa·s, D in µm²/s,
radius and diameter in nm.
"""

from __future__ import annotations

import numpy as np

from .errors import expected_got

#: Boltzmann constant, J/K, exact since the 2019 SI redefinition (BIPM SI brochure, 9th ed.).
BOLTZMANN_J_K = 1.380649e-23
#: 0 °C in kelvin.
ZERO_CELSIUS_K = 273.15

# Pátek, Hrubý, Klomfar, Součková & Harvey 2009, J. Phys. Chem. Ref. Data 38:21, eq. (9):
# eta / µPa s = sum a_i (T / 300 K)^b_i, valid 253–383 K at 0.1 MPa.
_PATEK_A = np.array([280.68, 511.45, 61.131, 0.45903])
_PATEK_B = np.array([-1.9, -7.7, -19.6, -40.0])
_PATEK_RANGE_C = (253.15 - ZERO_CELSIUS_K, 383.15 - ZERO_CELSIUS_K)


def water_viscosity_mpa_s(temperature_c: float | np.ndarray) -> float | np.ndarray:
    """Viscosity of liquid water at 0.1 MPa.

    Parameters
    ----------
    temperature_c : float or array, °C
        Temperature, -20 to 110 °C (supercooled and superheated liquid included).

    Returns
    -------
    float or array, mPa·s

    Notes
    -----
    Pátek et al. (2009) correlation, eta = sum_i a_i (T/300 K)^b_i µPa·s, which reproduces the IAPWS 2008
    formulation (Huber et al. 2009) to 0.003 % over 0–99 °C.

    References
    ----------
    J. Pátek et al., J. Phys. Chem. Ref. Data 38, 21 (2009), doi:10.1063/1.3043575.
    M. L. Huber et al., J. Phys. Chem. Ref. Data 38, 101 (2009), doi:10.1063/1.3088050.

    Examples
    --------
    >>> round(water_viscosity_mpa_s(25.0), 4)
    0.89
    """
    t = np.asarray(temperature_c, dtype=float)
    lo, hi = _PATEK_RANGE_C
    if np.any(~np.isfinite(t)) or np.any(t < lo - 1e-9) or np.any(t > hi + 1e-9):
        raise ValueError(
            expected_got(
                "temperature_c for water",
                f"between {lo:.0f} and {hi:.0f} °C",
                temperature_c,
                "Check sample.temperature_c (degrees Celsius, not kelvin).",
            )
        )
    reduced = (t + ZERO_CELSIUS_K) / 300.0
    eta_upa_s = np.sum(_PATEK_A[:, None] * reduced.reshape(1, -1) ** _PATEK_B[:, None], axis=0)
    out = eta_upa_s.reshape(t.shape) * 1e-3
    return float(out) if out.ndim == 0 else out


def _check_positive(name: str, value, fix: str) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if np.any(~np.isfinite(arr)) or np.any(arr <= 0):
        raise ValueError(expected_got(name, "finite and > 0", value, fix))
    return arr


def _kelvin(temperature_c) -> np.ndarray:
    t = np.asarray(temperature_c, dtype=float) + ZERO_CELSIUS_K
    if np.any(~np.isfinite(t)) or np.any(t <= 0):
        raise ValueError(expected_got("temperature_c", "above -273.15 °C", temperature_c, "Give °C."))
    return t


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
