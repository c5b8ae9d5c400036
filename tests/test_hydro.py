"""Media viscosities, Stokes–Einstein with intervals and wall corrections against published values."""

import json
import math

import numpy as np
import pytest

from msdkit import hydro
from msdkit.config import config_from_dict
from msdkit.errors import ConfigError

# IAPWS R12-08 (Huber et al. 2009, J. Phys. Chem. Ref. Data 38:101), 0.1 MPa, values computed with the
# `iapws` package (METHODS.md).
IAPWS_WATER_MPA_S = {15: 1.13757, 20: 1.00160, 22: 0.95440, 25: 0.89002, 30: 0.79722, 37: 0.69130,
                     40: 0.65273, 60: 0.46603}


def test_boltzmann_constant_is_the_exact_si_value():
    # SI 2019 redefinition, BIPM SI brochure 9th ed.
    assert hydro.BOLTZMANN_J_K == 1.380649e-23


@pytest.mark.parametrize("temperature_c", sorted(IAPWS_WATER_MPA_S))
def test_water_viscosity_matches_iapws_2008_table(temperature_c):
    # Pátek 2009 reproduces IAPWS 2008 to 0.003 % (Pátek et al. 2009); table rounded to 5 figures.
    assert hydro.water_viscosity_mpa_s(temperature_c) == pytest.approx(IAPWS_WATER_MPA_S[temperature_c],
                                                                     rel=6e-5)


def test_water_viscosity_matches_the_iapws_package_from_0_to_99_c():
    iapws = pytest.importorskip("iapws")  # general-purpose reference library (IAPWS 2008 viscosity)
    for t in np.arange(0.5, 99.0, 7.5):
        ref = iapws.IAPWS95(T=273.15 + t, P=0.101325).mu * 1e3
        assert hydro.water_viscosity_mpa_s(t) == pytest.approx(ref, rel=1e-4)


def test_heavy_water_viscosity_matches_iapws_2020_check_values():
    # IAPWS 2020 formulation for D2O, computed with the `iapws` package (METHODS.md).
    assert hydro.heavy_water_viscosity_mpa_s(20.0) == pytest.approx(1.24301, rel=5e-5)
    assert hydro.heavy_water_viscosity_mpa_s(25.0) == pytest.approx(1.09277, rel=5e-5)


def test_heavy_water_viscosity_and_density_match_the_iapws_package_over_the_liquid_range():
    iapws = pytest.importorskip("iapws")  # IAPWS R16-17 equation of state and R19-20 viscosity for D2O
    for t in [4.0, 10.0, 30.0, 37.0, 50.0, 70.0, 90.0, 100.0]:
        state = iapws.D2O(T=273.15 + t, P=0.101325)
        assert hydro.heavy_water_density_kg_m3(t) == pytest.approx(state.rho, rel=1e-7)
        assert hydro.heavy_water_viscosity_mpa_s(t) == pytest.approx(state.mu * 1e3, rel=1e-6)


def test_heavy_water_is_about_23_percent_more_viscous_than_water_at_25_c():
    # D2O/H2O viscosity ratio ≈ 1.23 at room temperature (Hardy & Cottington 1949, from memory)
    ratio = hydro.heavy_water_viscosity_mpa_s(25.0) / hydro.water_viscosity_mpa_s(25.0)
    assert 1.21 < ratio < 1.25


@pytest.mark.parametrize(
    ("fraction", "temperature_c", "segur_mpa_s"),
    # Segur & Oberstar 1951, Ind. Eng. Chem. 43:2117, table (via METHODS.md)
    [(0.4, 20.0, 3.72), (0.6, 20.0, 10.8), (0.4, 30.0, 2.72), (0.6, 30.0, 7.19)],
)
def test_glycerol_water_viscosity_matches_segur_and_oberstar_within_4_percent(fraction, temperature_c,
                                                                                segur_mpa_s):
    eta = hydro.glycerol_water_viscosity_mpa_s(temperature_c, mass_fraction=fraction)
    assert eta == pytest.approx(segur_mpa_s, rel=0.04)


def test_pure_glycerol_viscosity_at_20_c_is_about_1400_mpa_s():
    # Segur & Oberstar 1951: 1410 mPa·s at 20 °C (from memory); Cheng's μ_g term gives 1.40e3.
    assert hydro.glycerol_water_viscosity_mpa_s(20.0, mass_fraction=1.0) == pytest.approx(1410, rel=0.05)


def test_zero_glycerol_is_water():
    # The mixture rule reduces to the water term at C_m = 0 (Cheng 2008, eq. for alpha).
    assert hydro.glycerol_water_viscosity_mpa_s(37.0, mass_fraction=0.0) == pytest.approx(
        hydro.water_viscosity_mpa_s(37.0), rel=1e-12)


def test_pure_liquid_densities_of_the_volk_kahler_model_match_handbook_values():
    # CRC Handbook (from memory): glycerol 1261.1 kg/m³, water 998.21 kg/m³ at 20 °C.
    assert hydro.glycerol_density_kg_m3(20.0) == pytest.approx(1261.1, rel=5e-4)
    assert hydro.glycerol_water_density_kg_m3(20.0, mass_fraction=0.0) == pytest.approx(998.21, rel=5e-4)


def test_glycerol_water_mixture_density_at_50_percent_matches_handbook():
    # 50 % w/w glycerol at 20 °C: 1126.3 kg/m³ (Glycerine Producers' Association table, from memory);
    # Volk & Kähler 2018 claim ~0.1 %.
    assert hydro.glycerol_water_density_kg_m3(20.0, mass_fraction=0.5) == pytest.approx(1126.3, rel=3e-3)


def test_volume_fraction_converts_to_mass_fraction_with_pure_densities():
    # w = ρ_g v / (ρ_g v + ρ_w (1 − v)) (definition of fractions; densities Volk & Kähler 2018)
    rg, rw = 1273.0 - 0.612 * 20.0, 1000.0 * (1 - abs((20.0 - 3.98) / 615.0) ** 1.71)
    assert hydro.glycerol_mass_fraction(0.5) == pytest.approx(rg / (rg + rw), rel=1e-12)
    by_volume = hydro.glycerol_water_viscosity_mpa_s(25.0, volume_fraction=0.5)
    by_mass = hydro.glycerol_water_viscosity_mpa_s(25.0, mass_fraction=rg / (rg + rw))
    assert by_volume == pytest.approx(by_mass, rel=1e-12)


def test_saline_is_1_02_times_water():
    # common practice (METHODS.md: 1.015–1.02 × water)
    for name, t in (("pbs", 37), ("saline", 25)):
        assert hydro.medium_viscosity_mpa_s(name, t) == pytest.approx(1.02 * IAPWS_WATER_MPA_S[t], rel=1e-4)


def test_fixed_viscosity_medium_ignores_temperature():
    # contract of the config (DESIGN.md): {viscosity_mpa_s: 3.0}
    assert hydro.medium_viscosity_mpa_s({"viscosity_mpa_s": 3.0}, 15.0) == 3.0
    assert hydro.medium_viscosity_mpa_s({"viscosity_mpa_s": 3.0}, 37.0) == 3.0


def test_viscosity_table_interpolation_reproduces_water_between_sparse_nodes():
    # Andrade form ln η linear in 1/T is within 0.5 % for water between nodes 10 K apart (IAPWS 2008 values).
    table = {"temperature_c": [20.0, 30.0, 40.0], "viscosity_mpa_s": [1.00160, 0.79722, 0.65273]}
    assert hydro.medium_viscosity_mpa_s(table, 30.0) == pytest.approx(0.79722, rel=1e-12)
    assert hydro.medium_viscosity_mpa_s(table, 25.0) == pytest.approx(IAPWS_WATER_MPA_S[25], rel=5e-3)
    assert hydro.medium_viscosity_mpa_s(table, 37.0) == pytest.approx(IAPWS_WATER_MPA_S[37], rel=5e-3)


def test_bead_calibration_recovers_water_from_a_100_nm_bead_at_25_c():
    # Stokes–Einstein worked example (METHODS.md): 100 nm in water at 25 °C → D = 4.9073 µm²/s
    medium = {"reference_diameter_nm": 100.0, "reference_D_um2_s": 4.9073}
    assert hydro.medium_viscosity_mpa_s(medium, 25.0) == pytest.approx(0.89002, rel=2e-4)


def test_bead_calibrated_size_does_not_depend_on_temperature():
    # d = d_ref D_ref / D when both are measured at the same temperature (common practice)
    medium = {"reference_diameter_nm": 100.0, "reference_D_um2_s": 4.0}
    for t in (20.0, 37.0):
        s = hydro.stokes_einstein_size(2.0, temperature_c=t, medium=medium, temperature_sd_c=2.0)
        assert s.diameter_nm == pytest.approx(200.0, rel=1e-12)
        assert s.diameter_ci95_nm[0] == pytest.approx(200.0, rel=1e-12)


@pytest.mark.parametrize(
    ("medium", "temperature_c", "match"),
    [("water", 150.0, "between -20 and 110"), ("heavy_water", 2.0, "between 3.82 and 101"),
     ({"glycerol_mass_fraction": 0.4}, 105.0, "between 0 and 100"),
     ({"glycerol_mass_fraction": 1.2}, 25.0, "glycerol_mass_fraction must be between 0 and 1"),
     ({"glycerol_volume_fraction": -0.1}, 25.0, "glycerol_volume_fraction must be between 0 and 1"),
     ({"temperature_c": [20, 30], "viscosity_mpa_s": [1.0, 0.8]}, 35.0, "between 20 and 30"),
     ("honey", 25.0, "known medium"), ({"viscosity": 3}, 25.0, "medium forms")],
)
def test_out_of_range_or_unknown_media_raise_errors_naming_the_valid_range(medium, temperature_c, match):
    with pytest.raises(ValueError, match=match):
        hydro.medium_viscosity_mpa_s(medium, temperature_c)


@pytest.mark.parametrize(
    ("diameter_nm", "temperature_c", "D_um2_s"),
    # Einstein 1905 with IAPWS 2008 water, computed (METHODS.md)
    [(100, 25, 4.9073), (100, 20, 4.2876), (100, 37, 6.5723), (200, 25, 2.4537), (500, 25, 0.9815)],
)
def test_stokes_einstein_worked_examples(diameter_nm, temperature_c, D_um2_s):
    eta = hydro.water_viscosity_mpa_s(temperature_c)
    D = hydro.stokes_einstein_D_um2_s(diameter_nm / 2, temperature_c=temperature_c, viscosity_mpa_s=eta)
    assert D == pytest.approx(D_um2_s, rel=5e-5)  # 5 figures; Pátek vs IAPWS 2008 within 3e-5
    d = hydro.stokes_einstein_diameter_nm(D_um2_s, temperature_c=temperature_c, viscosity_mpa_s=eta)
    assert d == pytest.approx(diameter_nm, rel=5e-5)


def test_size_interval_carries_the_D_interval_exactly_without_temperature_error():
    # d ∝ 1/D (Einstein 1905): the D interval maps to the size interval, ends swapped.
    s = hydro.stokes_einstein_size(4.9073, temperature_c=25.0, D_ci95_um2_s=(4.5, 5.5))
    d = s.diameter_nm
    assert d == pytest.approx(100.0, rel=1e-4)
    assert s.diameter_ci95_nm[0] == pytest.approx(d * 4.9073 / 5.5, rel=1e-12)
    assert s.diameter_ci95_nm[1] == pytest.approx(d * 4.9073 / 4.5, rel=1e-12)
    assert s["radius_nm"] == pytest.approx(d / 2)


def test_one_kelvin_of_temperature_error_is_2_6_percent_of_size_in_water_at_25_c():
    # d ln d/dT = 1/T − d ln η/dT = 0.34 % + 2.28 %/K (METHODS.md, computed from IAPWS 2008)
    assert hydro.viscosity_temperature_slope_per_k("water", 25.0) == pytest.approx(-0.0228, abs=2e-4)
    s = hydro.stokes_einstein_size(4.9073, temperature_c=25.0, temperature_sd_c=1.0)
    rel_sd = math.log(s.diameter_ci95_nm[1] / s.diameter_nm) / hydro.Z95
    assert rel_sd == pytest.approx(0.0262, abs=3e-4)


def test_size_with_an_interval_reaching_zero_D_has_an_open_upper_end_and_serialises():
    s = hydro.stokes_einstein_size(1.0, temperature_c=25.0, D_ci95_um2_s=(-0.2, 2.0))
    assert math.isinf(s.diameter_ci95_nm[1])
    assert json.loads(json.dumps(s.to_dict()))["diameter_ci95_nm"][1] is None


@pytest.mark.parametrize(
    ("ratio", "parallel", "perpendicular"),
    # Faxén series and Brenner 1961 exact series (METHODS.md, computed). METHODS lists 0.8880 for h/r = 10;
    # the series gives 0.887947, as does the far-field expansion 1 − 9/8 q + q³/2 − 57/100 q⁴ + q⁵/5
    # (q = r/h; Bevan & Prieve 2000, J. Chem. Phys. 113:1228, from memory), hence 0.8879.
    [(2.0, 0.7214, 0.4705), (10.0, 0.9439, 0.8879)],
)
def test_wall_factors_match_faxen_and_brenner_tables(ratio, parallel, perpendicular):
    assert hydro.faxen_parallel_factor(ratio) == pytest.approx(parallel, abs=5e-5)
    assert hydro.brenner_perpendicular_factor(ratio) == pytest.approx(perpendicular, abs=5e-5)


def test_brenner_factor_approaches_the_lorentz_limit_far_from_the_wall():
    # D⊥/D₀ ≈ 1 − 9/8 (r/h) for h ≫ r (Lorentz 1907; Happel & Brenner 1965)
    h = 200.0
    assert hydro.brenner_perpendicular_factor(h) == pytest.approx(1 - 9 / 8 / h, abs=1e-4)


def test_brenner_series_converges_near_contact():
    # D⊥ → 0 as the gap closes; lubrication gives D⊥/D₀ ≈ (h − r)/r (Happel & Brenner 1965)
    f = hydro.brenner_perpendicular_factor(1.01)
    assert 0.008 < f < 0.011


def test_wall_correction_inverts_the_faxen_factor_for_a_known_sphere():
    eta = hydro.water_viscosity_mpa_s(25.0)
    D0 = hydro.stokes_einstein_D_um2_s(50.0, temperature_c=25.0, viscosity_mpa_s=eta)
    h_um = 0.1  # h/r = 2
    measured = np.array([D0 * hydro.faxen_parallel_factor(2.0), -1.0, np.nan])
    kw = dict(temperature_c=25.0, viscosity_mpa_s=eta)
    out = hydro.wall_corrected_D_um2_s(measured, wall_distance_um=h_um, **kw)
    assert out[0] == pytest.approx(D0, rel=1e-9)
    assert np.isnan(out[1]) and np.isnan(out[2])
    size = hydro.stokes_einstein_size(measured[0], temperature_c=25.0, wall_distance_um=h_um)
    assert size.diameter_nm == pytest.approx(100.0, rel=1e-6)


def test_config_accepts_every_medium_form_and_keeps_water_as_a_plain_name():
    # DESIGN.md contract: `medium: water` and `medium: {viscosity_mpa_s: 3.0}`
    base = {"inputs": ["a.tif"]}
    assert config_from_dict({**base, "sample": {"medium": "water"}}).sample.medium == "water"
    assert config_from_dict({**base, "sample": {"medium": "D2O"}}).sample.medium == "heavy_water"
    fixed = config_from_dict({**base, "sample": {"medium": {"viscosity_mpa_s": 3.0}}}).sample.medium
    assert fixed.viscosity_mpa_s == 3.0 and fixed.model_dump() == {"viscosity_mpa_s": 3.0}
    for medium in ({"glycerol_mass_fraction": 0.4}, {"glycerol_volume_fraction": 0.4},
                   {"temperature_c": [20, 30], "viscosity_mpa_s": [1.0, 0.8]},
                   {"reference_diameter_nm": 100, "reference_D_um2_s": 4.3}):
        cfg = config_from_dict({**base, "sample": {"medium": medium}})
        eta = hydro.medium_viscosity_mpa_s(cfg.sample.medium, 25.0)
        assert eta == pytest.approx(hydro.medium_viscosity_mpa_s(cfg.sample.medium.model_dump(), 25.0))


@pytest.mark.parametrize(
    ("sample", "match"),
    [({"medium": "watr"}, "did you mean 'water'"),
     ({"medium": {"glycerol_fraction": 0.4}}, "did you mean 'glycerol_mass_fraction'"),
     ({"medium": {"glycerol_mass_fraction": 1.5}}, "less than or equal to 1"),
     ({"medium": "heavy_water", "temperature_c": 1.0}, "between 3.82 and 101"),
     ({"medium": {"temperature_c": [20, 30], "viscosity_mpa_s": [1.0]}}, "one viscosity per temperature")],
)
def test_config_rejects_bad_media_with_a_message_that_says_what_to_do(sample, match):
    with pytest.raises(ConfigError, match=match):
        config_from_dict({"inputs": ["a.tif"], "sample": sample})
