"""Synthetic movies: optics, camera noise, scene motion against known physics, recipes and files."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from msdkit.errors import ConfigError
from msdkit.simulate import (
    camera_counts,
    expected_photon_image,
    load_recipe,
    recipe_from_dict,
    render_movie,
    render_scene,
    scene_truth,
    simulate_from_recipe,
)
from msdkit.simulate.optics import psf_sigma_um

SEEDS = [0, 1, 2]


def _moments(img: np.ndarray) -> tuple[float, float, float, float, float]:
    ny, nx = img.shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    total = img.sum()
    cx, cy = (img * xx).sum() / total, (img * yy).sum() / total
    vx = (img * (xx - cx) ** 2).sum() / total
    vy = (img * (yy - cy) ** 2).sum() / total
    return total, cx, cy, vx, vy


# --------------------------------------------------------------------------------------- optics ----
@pytest.mark.parametrize("x, y, sigma", [(10.0, 10.0, 1.0), (9.37, 11.81, 0.6), (18.5, 17.25, 2.3)])
def test_pixel_integrated_spot_holds_all_photons_centred_on_the_particle(x, y, sigma):
    # A normalised 2D Gaussian integrates to its amplitude and its mean is its centre; pixel integration
    # preserves both (common practice; erf form as in Smith et al. 2010, Nat. Methods 7:373).
    img = expected_photon_image([x], [y], [5000.0], frame_shape=(36, 38), psf_sigma_px=sigma)
    total, cx, cy, vx, vy = _moments(img)
    assert total == pytest.approx(5000.0, rel=1e-4)
    assert cx == pytest.approx(x, abs=1e-3)
    assert cy == pytest.approx(y, abs=1e-3)
    # Binning into unit pixels adds 1/12 px^2 to the variance (Sheppard's correction, common practice).
    assert vx == pytest.approx(sigma**2 + 1 / 12, rel=2e-3)
    assert vy == pytest.approx(sigma**2 + 1 / 12, rel=2e-3)


def test_pixel_value_equals_numerical_integral_of_the_gaussian():
    # Reference: scipy.integrate.dblquad of the 2D normal density over one pixel's area.
    x, y, s, n = 7.3, 6.8, 1.1, 1000.0
    img = expected_photon_image([x], [y], [n], frame_shape=(15, 15), psf_sigma_px=s)
    for row, col in [(7, 7), (6, 8), (9, 4)]:
        ref, _ = integrate.dblquad(
            lambda v, u: stats.norm.pdf(u, x, s) * stats.norm.pdf(v, y, s),
            col - 0.5,
            col + 0.5,
            row - 0.5,
            row + 0.5,
        )
        assert img[row, col] == pytest.approx(n * ref, rel=1e-6)


def test_spot_cut_by_the_image_border_keeps_only_the_light_inside():
    # Half of a Gaussian centred on the edge x = -0.5 falls outside the image (common practice).
    img = expected_photon_image([-0.5], [10.0], [1000.0], frame_shape=(21, 10), psf_sigma_px=1.3)
    assert img.sum() == pytest.approx(500.0, rel=1e-4)


def test_motion_blur_adds_the_variance_of_the_path_to_the_spot():
    # The exposure-averaged spot is a mixture of Gaussians: its variance along the motion is
    # sigma^2 + 1/12 + Var(sub-step positions) (law of total variance; common practice).
    xs = np.linspace(6.0, 14.0, 9)
    img = render_movie(
        xs[None, None, :],
        np.full((1, 1, 9), 10.0),
        1e4,
        frame_shape=(21, 21),
        psf_sigma_px=1.0,
        offset_adu=0.0,
        rng=0,
    )
    expected = expected_photon_image(xs, np.full(9, 10.0), 1e4 / 9, frame_shape=(21, 21), psf_sigma_px=1.0)
    total, cx, cy, vx, vy = _moments(expected)
    assert cx == pytest.approx(10.0, abs=1e-3)
    assert vx == pytest.approx(1.0 + 1 / 12 + xs.var(), rel=2e-3)
    assert vy == pytest.approx(1.0 + 1 / 12, rel=2e-3)
    assert img.dtype == np.uint16 and img.shape == (1, 21, 21)


def test_defocused_spot_at_the_edge_of_the_focal_depth_is_wider_and_dimmer():
    # The defocus model: at |z| = focal_depth/2 the area grows 2x and the collected light halves.
    from msdkit.simulate.optics import emitter_image

    img = emitter_image(
        [[10.0]], [[10.0]], [4000.0], frame_shape=(21, 21), psf_sigma_px=1.2, z_um=[[0.4]], focal_depth_um=0.8
    )
    total, cx, cy, vx, vy = _moments(img)
    assert total == pytest.approx(2000.0, rel=1e-4)
    assert vx == pytest.approx(2 * 1.2**2 + 1 / 12, rel=2e-3)


def test_psf_width_from_wavelength_and_aperture():
    # sigma = 0.21 lambda / NA (Zhang, Zerubia & Olivo-Marin 2007, Appl. Opt. 46:1819).
    assert psf_sigma_um(wavelength_nm=600, numerical_aperture=1.4) == pytest.approx(0.09, rel=1e-12)


# --------------------------------------------------------------------------------------- camera ----
@pytest.mark.parametrize("seed", SEEDS)
def test_shot_noise_variance_equals_the_mean(seed):
    # Poisson statistics: variance = mean (common practice). SD of the sample variance of Poisson(lam)
    # over N pixels is sqrt((lam + 2 lam^2) / N); tolerance 5 SD.
    lam, n = 40.0, 256 * 256
    counts = camera_counts(
        np.full((256, 256), lam),
        read_noise_electrons=0.0,
        gain_adu_per_electron=1.0,
        offset_adu=0.0,
        rng=seed,
    ).astype(float)
    sd_var = np.sqrt((lam + 2 * lam**2) / n)
    assert counts.mean() == pytest.approx(lam, abs=5 * np.sqrt(lam / n))
    assert counts.var(ddof=1) == pytest.approx(lam, abs=5 * sd_var)


@pytest.mark.parametrize("seed", SEEDS)
def test_camera_gain_and_read_noise_scale_the_variance(seed):
    # ADU = offset + g (Poisson(lam) + read noise): mean offset + g lam, variance g^2 (lam + s_r^2)
    # (+ 1/12 from rounding to integers; common practice).
    lam, g, s_r, off = 30.0, 2.0, 3.0, 100.0
    n = 256 * 256
    counts = camera_counts(
        np.full((256, 256), lam), read_noise_electrons=s_r, gain_adu_per_electron=g, offset_adu=off, rng=seed
    ).astype(float)
    var = g**2 * (lam + s_r**2) + 1 / 12
    # Var of the sample variance = (kappa_4 + 2 var^2) / N with kappa_4 = g^4 lam from the Poisson part.
    sd_var = np.sqrt((g**4 * lam + 2 * var**2) / n)
    assert counts.mean() == pytest.approx(off + g * lam, abs=5 * np.sqrt(var / n))
    assert counts.var(ddof=1) == pytest.approx(var, abs=5 * sd_var)


def test_camera_clips_to_16_bits():
    counts = camera_counts(np.array([[1e6, 0.0]]), offset_adu=0.0, rng=0)
    assert counts.dtype == np.uint16 and counts[0, 0] == 65535 and counts[0, 1] == 0


@pytest.mark.parametrize("seed", SEEDS)
def test_noisy_movie_of_a_still_particle_recovers_its_photons_and_position(seed):
    # The mean of shot-noise-limited frames is the expected image (common practice): integrated counts
    # above the background equal the photons and the centroid is the position, within their standard errors.
    n_frames, photons, bg = 200, 3000.0, 5.0
    x = np.full((n_frames, 1, 1), 11.3)
    y = np.full((n_frames, 1, 1), 9.6)
    movie = render_movie(
        x,
        y,
        photons,
        frame_shape=(21, 23),
        psf_sigma_px=1.1,
        background_photons=bg,
        offset_adu=100.0,
        rng=seed,
    ).astype(float)
    signal = movie - 100.0 - bg
    per_frame = signal.sum(axis=(1, 2))
    sd_total = np.sqrt(photons + bg * 21 * 23 + 21 * 23 / 12)  # Poisson variance of the sum, plus rounding
    assert per_frame.mean() == pytest.approx(photons, abs=5 * sd_total / np.sqrt(n_frames))
    mean_img = movie.mean(axis=0) - 100.0 - bg
    _, cx, cy, _, _ = _moments(mean_img)
    # centroid variance: sum over pixels of (x - x0)^2 Var(pixel) / (photons^2 n_frames),
    # with Var(pixel) = expected + 1/12
    yy, xx = np.mgrid[0:21, 0:23]
    expected_img = expected_photon_image([11.3], [9.6], [photons], frame_shape=(21, 23), psf_sigma_px=1.1)
    var_px = expected_img + bg + 1 / 12
    sd_x = np.sqrt((var_px * (xx - 11.3) ** 2).sum() / n_frames) / photons
    sd_y = np.sqrt((var_px * (yy - 9.6) ** 2).sum() / n_frames) / photons
    assert cx == pytest.approx(11.3, abs=5 * sd_x)
    assert cy == pytest.approx(9.6, abs=5 * sd_y)


# ---------------------------------------------------------------------------------------- scenes ----
def _scene(**over) -> dict:
    base = {
        "name": "t",
        "seed": 0,
        "width_px": 256,
        "height_px": 256,
        "pixel_size_um": 0.166,
        "n_frames": 30,
        "frame_interval_s": 0.05,
        "exposure_s": 0.0,
        "temperature_c": 25.0,
        "medium": "water",
        "optics": {"n_dims": 2},
        "camera": {"background_photons": 0.0, "read_noise_electrons": 0.0},
        "populations": [{"count_in_view": 2000, "diameter_nm": 200.0}],
    }
    base.update(over)
    return base


def _deep_inside(truth: pd.DataFrame, *, width_um: float, keep_um: float) -> pd.DataFrame:
    """Rows of particles that start at least keep_um from every image edge (they cannot leave)."""
    first = truth[truth["frame"] == 0]
    ok = first[
        (first["x_um"] > keep_um)
        & (first["x_um"] < width_um - keep_um)
        & (first["y_um"] > keep_um)
        & (first["y_um"] < width_um - keep_um)
    ]["particle"]
    return truth[truth["particle"].isin(ok)]


def _lag_sq(truth: pd.DataFrame, lag: int, every: int) -> np.ndarray:
    """Squared 2D displacements over ``lag`` frames from frames 0, every, 2 every, ... (disjoint windows)."""
    wide = truth.pivot(index="particle", columns="frame", values=["x_um", "y_um"])
    frames = wide["x_um"].columns.to_numpy()
    starts = frames[(frames % every == 0) & np.isin(frames + lag, frames)]
    dx = wide["x_um"][starts + lag].to_numpy() - wide["x_um"][starts].to_numpy()
    dy = wide["y_um"][starts + lag].to_numpy() - wide["y_um"][starts].to_numpy()
    sq = (dx**2 + dy**2).ravel()
    return sq[np.isfinite(sq)]


@pytest.mark.parametrize("seed", SEEDS)
def test_brownian_truth_follows_4Dt_with_the_stokes_einstein_D(seed):
    # 200 nm sphere in water at 25 °C: D = 2.4537 µm²/s (Stokes–Einstein, Einstein 1905; value computed
    # with IAPWS 2008 water viscosity, see METHODS). MSD = 4 D t in 2D. Squared displacements over
    # disjoint windows are independent exponentials: relative SD of their mean is 1/sqrt(N); tolerance 5 SD.
    truth, meta = scene_truth(recipe_from_dict(_scene()), rng=seed)
    assert truth["D_um2_s"].iloc[0] == pytest.approx(2.4537, rel=1e-4)
    width = 256 * 0.166
    inner = _deep_inside(truth, width_um=width, keep_um=4 * np.sqrt(2 * 2.4537 * 30 * 0.05))
    for lag in (1, 4):
        sq = _lag_sq(inner, lag, lag)
        expected = 4 * 2.4537 * lag * 0.05
        assert sq.size > 2000
        assert sq.mean() == pytest.approx(expected, rel=5 / np.sqrt(sq.size))


@pytest.mark.parametrize("seed", SEEDS)
def test_blurred_truth_positions_follow_the_motion_blur_formula(seed):
    # Exposure-averaged positions: MSD = 4 D (n dt - t_E/3) for a continuous exposure (Berglund 2010,
    # Phys. Rev. E 82:011917); with m midpoint sub-steps the offset is t_E/3 - t_E/(3 m^2) (computed).
    # Windows 2n apart share no exposure, so squared displacements are independent: tolerance 5/sqrt(N).
    m, dt = 4, 0.05
    rec = recipe_from_dict(_scene(exposure_s=dt, optics={"n_dims": 2, "blur_substeps": m}))
    truth, meta = scene_truth(rec, rng=seed)
    assert meta["blur_substeps"] == m
    inner = _deep_inside(truth, width_um=256 * 0.166, keep_um=4 * np.sqrt(2 * 2.4537 * 30 * dt))
    sq = _lag_sq(inner, 1, 2)
    expected = 4 * 2.4537 * (dt - dt / 3 + dt / (3 * m**2))
    assert sq.mean() == pytest.approx(expected, rel=5 / np.sqrt(sq.size))
    assert abs(sq.mean() - 4 * 2.4537 * dt) > 10 / np.sqrt(sq.size) * expected  # blur is visible


@pytest.mark.parametrize("seed", SEEDS)
def test_fbm_truth_follows_4K_t_alpha(seed):
    # Fractional Brownian motion: MSD = 4 K t^alpha in 2D (Mandelbrot & Van Ness 1968, SIAM Rev. 10:422).
    # One displacement per particle (independent particles): relative SD 1/sqrt(N); tolerance 5 SD.
    K, alpha, dt = 0.05, 0.5, 0.05
    rec = recipe_from_dict(
        _scene(
            n_frames=40,
            populations=[
                {"count_in_view": 1500, "motion": {"model": "fbm", "alpha": alpha, "K_um2_s_alpha": K}}
            ],
        )
    )
    truth, _ = scene_truth(rec, rng=seed)
    inner = _deep_inside(truth, width_um=256 * 0.166, keep_um=3.0)
    wide = inner.pivot(index="particle", columns="frame", values=["x_um", "y_um"]).dropna()
    for lag in (1, 8, 39):
        sq = (wide["x_um"][lag] - wide["x_um"][0]) ** 2 + (wide["y_um"][lag] - wide["y_um"][0]) ** 2
        expected = 4 * K * (lag * dt) ** alpha
        assert sq.mean() == pytest.approx(expected, rel=5 / np.sqrt(sq.size))
    assert (truth["alpha"] == alpha).all() and truth["D_um2_s"].isna().all()


@pytest.mark.parametrize("seed", SEEDS)
def test_directed_truth_adds_v2t2_to_diffusion(seed):
    # Directed motion: MSD = 4 D t + v^2 t^2 (Saxton & Jacobson 1997). Per particle Var|dr|^2 =
    # 16 D^2 t^2 + 8 D v^2 t^3 (Gaussian algebra, computed); tolerance 5 SD of the mean.
    D, v, dt, lag = 0.2, 1.5, 0.05, 10
    rec = recipe_from_dict(
        _scene(
            n_frames=lag + 1,
            populations=[
                {"count_in_view": 1500, "motion": {"model": "directed", "speed_um_s": v, "D_um2_s": D}}
            ],
        )
    )
    truth, _ = scene_truth(rec, rng=seed)
    inner = _deep_inside(truth, width_um=256 * 0.166, keep_um=3.0)
    wide = inner.pivot(index="particle", columns="frame", values=["x_um", "y_um"]).dropna()
    sq = (wide["x_um"][lag] - wide["x_um"][0]) ** 2 + (wide["y_um"][lag] - wide["y_um"][0]) ** 2
    t = lag * dt
    sd = np.sqrt(16 * D**2 * t**2 + 8 * D * v**2 * t**3) / np.sqrt(sq.size)
    assert sq.mean() == pytest.approx(4 * D * t + v**2 * t**2, abs=5 * sd)


@pytest.mark.parametrize("seed", SEEDS)
def test_confined_truth_plateaus_at_L2_over_3(seed):
    # Reflected diffusion in a square of side L: at long lags the 2D MSD is L^2/3 (two independent uniform
    # positions, Saxton & Jacobson 1997). Var of one squared displacement is 7 L^4 / 90 (computed).
    L = 0.5
    rec = recipe_from_dict(
        _scene(
            n_frames=21,
            populations=[
                {"count_in_view": 1500, "motion": {"model": "confined", "box_um": L, "D_um2_s": 2.0}}
            ],
        )
    )
    truth, _ = scene_truth(rec, rng=seed)
    inner = _deep_inside(truth, width_um=256 * 0.166, keep_um=1.0)
    wide = inner.pivot(index="particle", columns="frame", values=["x_um", "y_um"]).dropna()
    sq = (wide["x_um"][20] - wide["x_um"][0]) ** 2 + (wide["y_um"][20] - wide["y_um"][0]) ** 2
    assert sq.mean() == pytest.approx(L**2 / 3, abs=5 * np.sqrt(7 / 90) * L**2 / np.sqrt(sq.size))


def test_stage_drift_moves_every_truth_position_at_the_drift_velocity():
    # Constant stage drift shifts all image positions by v t (definition of the recipe's drift_um_s).
    v = np.array([0.8, -0.5])
    rec = recipe_from_dict(
        _scene(
            n_frames=11,
            drift_um_s=list(v),
            populations=[{"count_in_view": 200, "motion": {"model": "brownian", "D_um2_s": 1e-10}}],
        )
    )
    truth, meta = scene_truth(rec, rng=0)
    inner = _deep_inside(truth, width_um=256 * 0.166, keep_um=1.0)
    wide = inner.pivot(index="particle", columns="frame", values=["x_um", "y_um"]).dropna()
    assert len(wide) > 100
    shift = np.c_[wide["x_um"][10] - wide["x_um"][0], wide["y_um"][10] - wide["y_um"][0]]
    np.testing.assert_allclose(shift, np.broadcast_to(v * 10 * 0.05, shift.shape), atol=1e-4)
    assert meta["drift_um_s"] == pytest.approx(list(v))


@pytest.mark.parametrize("seed", SEEDS)
def test_number_in_focus_matches_the_recipe_and_stays_constant(seed):
    # Uniform independent particles: the count in the focal volume is binomial with mean count_in_view
    # (SD ~ sqrt(count)); exchanges at the box faces keep it stationary. Tolerance 5 SD.
    c = 400
    rec = recipe_from_dict(
        _scene(
            n_frames=60,
            frame_interval_s=0.05,
            populations=[{"count_in_view": c, "diameter_nm": 100.0}],
            optics={"n_dims": 3, "focal_depth_um": 1.0, "slab_um": 3.0},
        )
    )
    truth, meta = scene_truth(rec, rng=seed)
    per_frame = truth[truth["in_focus"]].groupby("frame").size()
    assert per_frame.loc[0] == pytest.approx(c, abs=5 * np.sqrt(c))
    assert per_frame.loc[50:].mean() == pytest.approx(c, abs=5 * np.sqrt(c))
    # particles come and go: tracks end when they leave the focal depth
    assert truth["particle"].nunique() > 2 * c
    assert meta["n_particles_total"] >= truth["particle"].nunique()


@pytest.mark.parametrize("seed", SEEDS)
def test_log_normal_diameters_have_the_recipe_geometric_sd(seed):
    # ln d ~ Normal(ln median, ln gsd) (Hatch & Choate 1929); SD of the sample SD is ~ s/sqrt(2N).
    rec = recipe_from_dict(
        _scene(
            n_frames=2,
            populations=[{"count_in_view": 3000, "diameter_nm": 150.0, "diameter_geometric_sd": 1.3}],
        )
    )
    truth, _ = scene_truth(rec, rng=seed)
    d = truth.drop_duplicates("particle")["diameter_nm"].to_numpy()
    s = np.log(1.3)
    assert np.log(d).std(ddof=1) == pytest.approx(s, abs=5 * s / np.sqrt(2 * d.size))
    assert np.median(np.log(d)) == pytest.approx(np.log(150.0), abs=5 * 1.26 * s / np.sqrt(d.size))


def test_rendered_scene_places_each_spot_at_its_truth_position():
    # Still, bright particles without background: the centroid of each isolated spot (x = column, y = row,
    # origin at the centre of pixel (0, 0); msdkit.schema) equals its truth position / pixel size, and its
    # counts equal its photons. SD of a shot-noise centroid is sigma/sqrt(photons) (common practice);
    # tolerance 5 SD.
    n_photons, sigma_um, ps = 20000.0, 0.2, 0.166
    rec = recipe_from_dict(
        _scene(
            width_px=64,
            height_px=64,
            n_frames=3,
            pixel_size_um=ps,
            optics={"n_dims": 2, "psf_sigma_um": sigma_um, "margin_um": 0.0},
            camera={"background_photons": 0.0, "read_noise_electrons": 0.0, "offset_adu": 100},
            populations=[
                {"count_in_view": 6, "photons": n_photons, "motion": {"model": "brownian", "D_um2_s": 1e-8}}
            ],
        )
    )
    frames, truth, meta = render_scene(rec, rng=3)
    sd_px = (sigma_um / ps) / np.sqrt(n_photons)
    half = 5  # window of +-4.5 spot SDs; another spot within half + 6 SD would spill into it
    yy, xx = np.mgrid[-half : half + 1, -half : half + 1]
    checked = 0
    for k in range(3):
        rows = truth[truth["frame"] == k]
        pos = rows[["x_um", "y_um"]].to_numpy() / ps
        for i, (x_px, y_px) in enumerate(pos):
            others = np.delete(pos, i, axis=0)
            isolated = np.all(np.abs(others - [x_px, y_px]).max(axis=1) > half + 6 * sigma_um / ps)
            cx0, cy0 = int(round(x_px)), int(round(y_px))
            if not isolated or not (half <= cx0 < 64 - half and half <= cy0 < 64 - half):
                continue
            win = frames[k, cy0 - half : cy0 + half + 1, cx0 - half : cx0 + half + 1].astype(float) - 100.0
            assert win.sum() == pytest.approx(n_photons, abs=5 * np.sqrt(n_photons) + 1.0)
            assert (win * xx).sum() / win.sum() + cx0 == pytest.approx(x_px, abs=5 * sd_px)
            assert (win * yy).sum() / win.sum() + cy0 == pytest.approx(y_px, abs=5 * sd_px)
            checked += 1
    assert checked >= 3


def test_render_and_truth_only_give_the_same_truth():
    rec = recipe_from_dict(
        _scene(
            width_px=48,
            height_px=40,
            n_frames=6,
            exposure_s=0.02,
            populations=[{"count_in_view": 10}],
            optics={"n_dims": 3},
        )
    )
    frames, truth, meta = render_scene(rec, rng=5)
    truth2, meta2 = scene_truth(rec, rng=5)
    assert frames.shape == (6, 40, 48) and frames.dtype == np.uint16
    pd.testing.assert_frame_equal(truth, truth2)
    assert meta["viscosity_mpa_s"] == pytest.approx(0.89002, rel=1e-4)  # IAPWS 2008 at 25 °C (METHODS)


# --------------------------------------------------------------------------------------- recipes ----
def test_demo_recipes_load_and_describe_their_physics(tmp_path):
    from pathlib import Path

    root = Path(__file__).resolve().parents[1] / "synthetic_movies"
    names = {p.stem for p in root.glob("*.yaml")}
    assert {"demo_beads_100nm", "demo_mixture_80_250nm", "demo_subdiffusive_gel", "demo_beads_37c"} <= names
    beads = load_recipe(root / "demo_beads_100nm.yaml")
    # 100 nm at 25 °C in water: 4.9073 µm²/s (METHODS, computed from IAPWS 2008 viscosity)
    assert float(beads.diffusion_um2_s(100.0, beads.populations[0].motion)) == pytest.approx(4.9073, rel=1e-4)
    warm = load_recipe(root / "demo_beads_37c.yaml")
    # 100 nm at 37 °C is 6.5723 µm²/s (METHODS); 200 nm is half of it
    assert float(warm.diffusion_um2_s(200.0, warm.populations[0].motion)) == pytest.approx(
        6.5723 / 2, rel=1e-4
    )
    gel = load_recipe(root / "demo_subdiffusive_gel.yaml")
    assert gel.populations[0].motion.model == "fbm" and gel.populations[0].motion.alpha == 0.5


def test_recipe_with_a_misspelt_key_names_the_nearest_key(tmp_path):
    p = tmp_path / "bad.yaml"
    p.write_text("populations: [{count_in_view: 5, diameter_mn: 100}]\n")
    with pytest.raises(
        ConfigError, match=r"bad.yaml: populations\.0\.diameter_mn: unknown key \(did you mean 'diameter_nm'"
    ):
        load_recipe(p)
    p.write_text("exposure_s: 0.1\nframe_interval_s: 0.05\npopulations: [{count_in_view: 5}]\n")
    with pytest.raises(ConfigError, match="exposure_s must be <= frame_interval_s"):
        load_recipe(p)
    p.write_text("populations: [{count_in_view: 5, motion: {model: levy}}]\n")
    with pytest.raises(ConfigError, match="motion model must be one of brownian, directed, confined, fbm"):
        load_recipe(p)
    with pytest.raises(ConfigError, match="scene recipe not found"):
        load_recipe(tmp_path / "none.yaml")


def test_simulate_from_recipe_writes_movie_truth_table_and_summary(tmp_path):
    import tifffile

    recipe = tmp_path / "tiny.yaml"
    recipe.write_text(
        "width_px: 40\nheight_px: 32\nn_frames: 8\nexposure_s: 0.01\n"
        "populations: [{count_in_view: 6, diameter_nm: 150}]\n"
    )
    paths = simulate_from_recipe(recipe, tmp_path / "out", seed=11)
    assert [p.name for p in paths] == ["tiny.ome.tif", "tiny_truth.csv", "tiny_truth.json"]
    movie = tifffile.imread(paths[0])
    assert movie.shape == (8, 32, 40) and movie.dtype == np.uint16
    truth = pd.read_csv(paths[1])
    assert {
        "particle",
        "frame",
        "time_s",
        "x_um",
        "y_um",
        "z_um",
        "in_focus",
        "diameter_nm",
        "D_um2_s",
    } <= set(truth.columns)
    summary = json.loads(paths[2].read_text())
    assert summary["seed"] == 11 and summary["temperature_c"] == 25.0
    assert summary["populations"][0]["D_um2_s"] == pytest.approx(2 * 2.4537 / 1.5, rel=1e-4)
    # the same seed gives the same movie; another seed a different one
    again = tifffile.imread(simulate_from_recipe(recipe, tmp_path / "again", seed=11)[0])
    other = tifffile.imread(simulate_from_recipe(recipe, tmp_path / "other", seed=12)[0])
    assert np.array_equal(movie, again) and not np.array_equal(movie, other)
    assert not list((tmp_path / "out").glob(".*"))  # no temporary files left
