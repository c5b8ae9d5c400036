"""Viscosity correlations of liquids at 0.1 MPa.

Water, saline, heavy water, glycerol–water, user tables and bead calibration.
Public names are re-exported by :mod:`msdkit.hydro`; use them from there. Temperatures in °C, viscosities in
mPa·s, densities in kg/m³.
"""

from __future__ import annotations

import numpy as np

from .errors import expected_got

#: Boltzmann constant, J/K, exact since the 2019 SI redefinition (BIPM SI brochure, 9th ed.).
BOLTZMANN_J_K = 1.380649e-23
#: 0 °C in kelvin.
ZERO_CELSIUS_K = 273.15
#: Saline / PBS viscosity relative to water at the same temperature (common practice; 1.015–1.02 is quoted).
SALINE_VISCOSITY_RATIO = 1.02

# Pátek, Hrubý, Klomfar, Součková & Harvey 2009, J. Phys. Chem. Ref. Data 38:21, eq. (9):
# eta / µPa s = sum a_i (T / 300 K)^b_i, valid 253–383 K at 0.1 MPa.
_PATEK_A = np.array([280.68, 511.45, 61.131, 0.45903])
_PATEK_B = np.array([-1.9, -7.7, -19.6, -40.0])
_PATEK_RANGE_C = (253.15 - ZERO_CELSIUS_K, 383.15 - ZERO_CELSIUS_K)

# Liquid heavy water at 0.1 MPa: from the triple point (276.969 K) to just below the normal boiling point.
_D2O_RANGE_C = (3.82, 101.0)
# Cheng (2008) was fitted for 0–100 °C and any mass fraction.
_GLYCEROL_RANGE_C = (0.0, 100.0)
_SALINE_RANGE_C = (0.0, 100.0)


def _check_range(what: str, value, lo: float, hi: float, fix: str) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    if np.any(~np.isfinite(arr)) or np.any(arr < lo - 1e-9) or np.any(arr > hi + 1e-9):
        raise ValueError(expected_got(what, f"between {lo:g} and {hi:g}", value, fix))
    return arr


def _scalar_or_array(out: np.ndarray):
    out = np.asarray(out, dtype=float)
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


# ----------------------------------------------------------------------------------------------------------
# Water
# ----------------------------------------------------------------------------------------------------------
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


def saline_viscosity_mpa_s(temperature_c: float | np.ndarray) -> float | np.ndarray:
    """Viscosity of physiological saline or PBS, taken as 1.02 × water at the same temperature.

    Notes
    -----
    0.9 % NaCl and phosphate-buffered saline are 1.5–2 % more viscous than water over 20–40 °C (common
    practice); the ratio is nearly independent of temperature. Use a fixed viscosity or a table for other
    buffers.
    """
    t = _check_range("temperature_c for saline/PBS", temperature_c, *_SALINE_RANGE_C,
                     "Check sample.temperature_c (°C).")
    return _scalar_or_array(SALINE_VISCOSITY_RATIO * np.asarray(water_viscosity_mpa_s(t)))


# ----------------------------------------------------------------------------------------------------------
# Heavy water: IAPWS 2020 viscosity with density from the IAPWS 2017 equation of state
# ----------------------------------------------------------------------------------------------------------
_D2O_TC_K = 643.847  # critical temperature, K
_D2O_RHOC_KG_M3 = 355.9999698294  # critical density, kg/m³ (17.77555 mol/dm³)
_D2O_R_J_KG_K = 8.3144598 / 20.027508e-3  # specific gas constant of D2O, J/(kg K)
# Residual Helmholtz energy of Herrig et al. (2018), IAPWS R16-17: polynomial (n, d, t) ...
_D2O_POLY = np.array([
    (0.122082060e-1, 4, 1.0000), (0.296956870e1, 1, 0.6555), (-0.379004540e1, 1, 0.9369),
    (0.941089600, 2, 0.5610), (-0.922466250, 2, 0.7017), (-0.139604190e-1, 3, 1.0672),
])
# ... exponential (n, d, t, c) ...
_D2O_EXP = np.array([
    (-0.125203570, 1, 3.9515, 1), (-0.555391500e1, 1, 4.6000, 2), (-0.493009740e1, 3, 5.1590, 2),
    (-0.359470240e-1, 2, 0.2000, 1), (-0.936172870e1, 2, 5.4644, 2), (-0.691835150, 1, 2.3660, 2),
])
# ... and Gaussian-bell terms (n, d, t, alpha, beta, gamma, epsilon).
_D2O_GAUSS = np.array([
    (-0.456110600e-1, 1, 3.4553, 0.6014, 0.4200, 1.5414, 1.8663),
    (-0.224513300e1, 3, 1.4150, 1.4723, 2.4318, 1.3794, 0.2895),
    (0.860006070e1, 1, 1.5745, 1.5305, 1.2888, 1.7385, 0.5803),
    (-0.248410420e1, 3, 3.4540, 2.4297, 8.2710, 1.3045, 0.2236),
    (0.164476900e2, 1, 3.8106, 1.3086, 0.3673, 2.7242, 0.6815),
    (0.270393360e1, 1, 4.8950, 1.3528, 0.9504, 3.5321, 0.9495),
    (0.375637470e2, 2, 1.4300, 3.4456, 7.8318, 2.4552, 1.1158),
    (-0.177607760e1, 2, 1.5870, 1.2645, 3.3281, 0.8319, 0.1607),
    (0.220924640e1, 2, 3.7900, 2.5547, 7.1753, 1.3500, 0.4144),
    (0.519652000e1, 1, 2.6200, 1.2148, 0.9465, 2.5617, 0.9683),
    (0.421097400, 1, 1.9000, 18.738, 1177.0, 1.0491, 0.9488),
    (-0.391921100, 1, 4.3200, 18.677, 1167.0, 1.0486, 0.9487),
])
# Viscosity, IAPWS R19-20 (Assael et al. 2021): dilute-gas term and residual term H_ij (i, j, H).
_D2O_H = np.array([
    (0, 0, 0.510953), (2, 0, -0.558947), (3, 0, -2.718820), (4, 0, 0.480990), (5, 0, 2.404510),
    (6, 0, -1.824320), (0, 1, 0.275847), (1, 1, 0.762957), (3, 1, 1.760340), (4, 1, 0.0819086),
    (6, 1, 1.417750), (0, 2, -0.228148), (1, 2, -0.321497), (5, 2, -2.302500), (0, 3, 0.0661035),
    (1, 3, 0.0449393), (2, 3, 1.466670), (5, 3, 0.938984), (6, 3, -0.108354), (0, 4, -0.00481265),
    (2, 4, -1.545710), (3, 4, -0.0570938), (5, 4, -0.0753783), (2, 5, 0.553080), (2, 6, -0.0650201),
])


def _d2o_delta_phir_delta(delta: np.ndarray, tau: np.ndarray) -> np.ndarray:
    """Delta * d(phi^r)/d(delta) of the IAPWS 2017 heavy-water equation of state."""
    d = delta[..., None]
    t = tau[..., None]
    n, di, ti = _D2O_POLY.T
    out = np.sum(n * di * d**di * t**ti, axis=-1)
    n, di, ti, ci = _D2O_EXP.T
    out += np.sum(n * d**di * t**ti * np.exp(-(d**ci)) * (di - ci * d**ci), axis=-1)
    n, di, ti, al, be, ga, ep = _D2O_GAUSS.T
    bell = n * d**di * t**ti * np.exp(-al * (d - ep) ** 2 - be * (t - ga) ** 2)
    out += np.sum(bell * (di - 2 * al * d * (d - ep)), axis=-1)
    return out


def heavy_water_density_kg_m3(temperature_c, *, pressure_mpa: float = 0.101325):
    """Density of liquid heavy water (D2O) from the IAPWS 2017 equation of state.

    Parameters
    ----------
    temperature_c : float or array, °C, 3.82–101 °C
    pressure_mpa : float, MPa, default=0.101325

    Returns
    -------
    float or array, kg/m³

    Notes
    -----
    Solves p = ρ R T (1 + δ ∂φʳ/∂δ) for the liquid root by Newton iteration from 1100 kg/m³, with the
    residual Helmholtz energy φʳ(δ, τ) of Herrig et al. (2018).

    References
    ----------
    S. Herrig et al., J. Phys. Chem. Ref. Data 47, 043102 (2018), doi:10.1063/1.5053993 (IAPWS R16-17).
    """
    t_c = _check_range("temperature_c for heavy water", temperature_c, *_D2O_RANGE_C,
                       "Heavy water is liquid at 0.1 MPa from 3.82 to 101.4 °C.")
    T = t_c + ZERO_CELSIUS_K
    tau = _D2O_TC_K / T
    p_pa = pressure_mpa * 1e6
    delta = np.full(T.shape, 1100.0 / _D2O_RHOC_KG_M3)

    def pressure(dl):
        return dl * _D2O_RHOC_KG_M3 * _D2O_R_J_KG_K * T * (1.0 + _d2o_delta_phir_delta(dl, tau))

    for _ in range(30):
        h = 1e-6 * delta
        f = pressure(delta) - p_pa
        slope = (pressure(delta + h) - pressure(delta - h)) / (2 * h)
        step = f / slope
        delta = delta - step
        if np.all(np.abs(step) < 1e-13 * delta):
            break
    return _scalar_or_array(delta * _D2O_RHOC_KG_M3)


def heavy_water_viscosity_mpa_s(temperature_c):
    """Viscosity of liquid heavy water (D2O) at 0.1 MPa, IAPWS 2020 formulation.

    Parameters
    ----------
    temperature_c : float or array, °C, 3.82–101 °C

    Returns
    -------
    float or array, mPa·s

    Notes
    -----
    η = η₀(T̄) η₁(T̄, ρ̄) with T̄ = T/643.847 K and ρ̄ = ρ/356 kg m⁻³; η₀ = √T̄ N(T̄)/D(T̄) µPa·s (eq. 11),
    η₁ = exp[ρ̄ Σ H_ij (1/T̄ − 1)^i (ρ̄ − 1)^j] (eq. 12). The critical enhancement is 1 to better than 1e-6 in
    the liquid at ambient pressure and is omitted. Density from :func:`heavy_water_density_kg_m3`.

    References
    ----------
    M. J. Assael et al., J. Phys. Chem. Ref. Data 50, 033102 (2021), doi:10.1063/5.0048711 (IAPWS R19-20).

    Examples
    --------
    >>> round(heavy_water_viscosity_mpa_s(25.0), 4)
    1.0928
    """
    rho = np.asarray(heavy_water_density_kg_m3(temperature_c), dtype=float)
    tr = (np.asarray(temperature_c, dtype=float) + ZERO_CELSIUS_K) / _D2O_TC_K
    rr = rho / 356.0
    num = 0.889754 + 61.22217 * tr - 44.8866 * tr**2 + 111.5812 * tr**3 + 3.547412 * tr**4
    den = 0.79637 + 2.38127 * tr - 0.33463 * tr**2 + 2.669 * tr**3 + 0.000211366 * tr**4
    eta0 = np.sqrt(tr) * num / den
    i, j, h = _D2O_H.T
    s = np.sum(h * ((1.0 / tr)[..., None] - 1.0) ** i * (rr[..., None] - 1.0) ** j, axis=-1)
    eta1 = np.exp(rr * s)
    return _scalar_or_array(eta0 * eta1 * 1e-3)


# ----------------------------------------------------------------------------------------------------------
# Glycerol–water
# ----------------------------------------------------------------------------------------------------------
def glycerol_density_kg_m3(temperature_c):
    """Density of pure glycerol, ρ_g = 1273 − 0.612 T (T in °C; Volk & Kähler 2018, eq. 2)."""
    t = np.asarray(temperature_c, dtype=float)
    return _scalar_or_array(1273.0 - 0.612 * t)


def _vk_water_density_kg_m3(temperature_c):
    """Density of water in the Volk & Kähler (2018) model, ρ_w = 1000 (1 − |(T − 3.98)/615|^1.71)."""
    t = np.asarray(temperature_c, dtype=float)
    return 1000.0 * (1.0 - np.abs((t - 3.98) / 615.0) ** 1.71)


def glycerol_mass_fraction(volume_fraction, *, temperature_c: float = 20.0):
    """Convert a glycerol volume fraction (volumes of the pure liquids before mixing) to a mass fraction.

    Parameters
    ----------
    volume_fraction : float or array, 0–1
        V_glycerol / (V_glycerol + V_water), both measured as pure liquids.
    temperature_c : float, °C, default=20
        Temperature at which the volumes were measured (the mixture is usually made at room temperature).

    Returns
    -------
    float or array
        m_glycerol / (m_glycerol + m_water).

    References
    ----------
    A. Volk & C. J. Kähler, Exp. Fluids 59, 75 (2018), doi:10.1007/s00348-018-2527-y (pure-liquid densities).
    """
    cv = _check_range("glycerol_volume_fraction", volume_fraction, 0.0, 1.0,
                      "Give the fraction as a number from 0 to 1 (0.4 for 40 % v/v).")
    _check_range("temperature_c for glycerol–water", temperature_c, *_GLYCEROL_RANGE_C, "Give °C.")
    rg = glycerol_density_kg_m3(temperature_c)
    rw = _vk_water_density_kg_m3(temperature_c)
    return _scalar_or_array(rg * cv / (rg * cv + rw * (1.0 - cv)))


def glycerol_water_density_kg_m3(temperature_c, *, mass_fraction):
    """Density of a glycerol–water mixture (Volk & Kähler 2018).

    Notes
    -----
    ρ = (1 + κ sin(C_v^1.3 π)) (ρ_g C_v + ρ_w (1 − C_v)), κ = 1.78e-6 T² − 1.82e-4 T + 1.41e-2, with C_v the
    volume fraction of the unmixed liquids; the sine term is the volume contraction on mixing (≈ 1 %).

    References
    ----------
    A. Volk & C. J. Kähler, Exp. Fluids 59, 75 (2018), doi:10.1007/s00348-018-2527-y.
    """
    cm = _check_range("glycerol_mass_fraction", mass_fraction, 0.0, 1.0, "Give a number from 0 to 1.")
    t = _check_range("temperature_c for glycerol–water", temperature_c, *_GLYCEROL_RANGE_C, "Give °C.")
    rg = np.asarray(glycerol_density_kg_m3(t))
    rw = _vk_water_density_kg_m3(t)
    cv = (cm / rg) / (cm / rg + (1.0 - cm) / rw)
    kappa = 1.78e-6 * t**2 - 1.82e-4 * t + 1.41e-2
    return _scalar_or_array((1.0 + kappa * np.sin(cv**1.3 * np.pi)) * (rg * cv + rw * (1.0 - cv)))


def glycerol_water_viscosity_mpa_s(temperature_c, *, mass_fraction=None, volume_fraction=None,
                                   mixing_temperature_c: float = 20.0):
    """Viscosity of a glycerol–water mixture (Cheng 2008), by mass or by volume fraction of glycerol.

    Parameters
    ----------
    temperature_c : float or array, °C, 0–100
    mass_fraction : float, 0–1, optional
        Mass of glycerol over total mass. Give this or ``volume_fraction``.
    volume_fraction : float, 0–1, optional
        Volume of pure glycerol over the sum of the pure volumes, converted to a mass fraction with the
        densities at ``mixing_temperature_c``.
    mixing_temperature_c : float, °C, default=20

    Returns
    -------
    float or array, mPa·s

    Notes
    -----
    μ = μ_w^α μ_g^(1−α), μ_g = 12100 exp[(−1233 + T) T / (9900 + 70 T)],
    α = 1 − C_m + a b C_m (1 − C_m) / (a C_m + b (1 − C_m)), a = 0.705 − 0.0017 T, b = (4.9 + 0.036 T) a^2.5.
    For μ_w this uses IAPWS water (:func:`water_viscosity_mpa_s`) instead of Cheng's own fit (they differ by
    < 0.5 %), so that a zero fraction gives water exactly. Agrees with Segur & Oberstar (1951) to ~1 %.

    References
    ----------
    N.-S. Cheng, Ind. Eng. Chem. Res. 47, 3285 (2008), doi:10.1021/ie071349z.
    J. B. Segur & H. E. Oberstar, Ind. Eng. Chem. 43, 2117 (1951), doi:10.1021/ie50501a040.
    """
    if (mass_fraction is None) == (volume_fraction is None):
        raise ValueError(expected_got("the glycerol fraction", "given once, by mass or by volume",
                                      f"mass_fraction={mass_fraction}, volume_fraction={volume_fraction}",
                                      "Give glycerol_mass_fraction or glycerol_volume_fraction, not both."))
    if volume_fraction is not None:
        cm = np.asarray(glycerol_mass_fraction(volume_fraction, temperature_c=mixing_temperature_c))
    else:
        cm = _check_range("glycerol_mass_fraction", mass_fraction, 0.0, 1.0,
                          "Give the fraction as a number from 0 to 1 (0.4 for 40 % w/w).")
    t = _check_range("temperature_c for glycerol–water", temperature_c, *_GLYCEROL_RANGE_C,
                     "The Cheng (2008) correlation covers 0–100 °C.")
    mu_w = np.asarray(water_viscosity_mpa_s(t))
    mu_g = 12100.0 * np.exp((-1233.0 + t) * t / (9900.0 + 70.0 * t))
    a = 0.705 - 0.0017 * t
    b = (4.9 + 0.036 * t) * a**2.5
    alpha = 1.0 - cm + a * b * cm * (1.0 - cm) / (a * cm + b * (1.0 - cm))
    return _scalar_or_array(mu_w**alpha * mu_g ** (1.0 - alpha))


# ----------------------------------------------------------------------------------------------------------
# User table and bead calibration
# ----------------------------------------------------------------------------------------------------------
def table_viscosity_mpa_s(temperature_c, *, table_temperature_c, table_viscosity_mpa_s):
    """Viscosity interpolated in a user table of temperature → viscosity.

    ln η is interpolated linearly in 1/T (Andrade's form, exact for an Arrhenius liquid); one entry means a
    fixed viscosity at that temperature only. Temperatures outside the table are an error (no extrapolation).
    """
    tt = np.asarray(table_temperature_c, dtype=float).ravel()
    vv = np.asarray(table_viscosity_mpa_s, dtype=float).ravel()
    if tt.size == 0 or tt.size != vv.size:
        raise ValueError(expected_got("a viscosity table",
                                      "equal-length lists temperature_c and viscosity_mpa_s",
                                      f"{tt.size} temperatures and {vv.size} viscosities",
                                      "Give one viscosity per temperature."))
    if np.any(~np.isfinite(vv)) or np.any(vv <= 0) or np.any(~np.isfinite(tt)):
        raise ValueError(expected_got("table viscosities", "finite and > 0", list(vv), "Give mPa·s."))
    order = np.argsort(tt)
    tt, vv = tt[order], vv[order]
    if np.any(np.diff(tt) <= 0):
        raise ValueError(expected_got("table temperatures", "all different", list(tt), "Remove duplicates."))
    t = _check_range("temperature_c for the viscosity table", temperature_c, tt[0], tt[-1],
                     "Extend the table to cover the sample temperature.")
    if tt.size == 1:
        return _scalar_or_array(np.full(t.shape, vv[0]))
    inv = 1.0 / (t + ZERO_CELSIUS_K)
    inv_nodes = 1.0 / (tt + ZERO_CELSIUS_K)
    out = np.exp(np.interp(inv, inv_nodes[::-1], np.log(vv)[::-1]))
    return _scalar_or_array(out)


def bead_calibrated_viscosity_mpa_s(temperature_c, *, reference_diameter_nm, reference_D_um2_s):
    """Effective viscosity from beads of known diameter, η = k_B T / (3 π d_ref D_ref) (common practice).

    ``reference_D_um2_s`` must be measured in the same medium at the same temperature as the sample; the
    sample's sizes are then d = d_ref D_ref / D whatever the temperature (T cancels).
    """
    d = _check_positive("reference_diameter_nm", reference_diameter_nm, "Give the certified bead diameter.")
    D = _check_positive("reference_D_um2_s", reference_D_um2_s, "Give the beads' measured D in µm²/s.")
    T = _kelvin(temperature_c)
    eta_pa_s = BOLTZMANN_J_K * T / (3.0 * np.pi * (d * 1e-9) * (D * 1e-12))
    return _scalar_or_array(eta_pa_s * 1e3)
