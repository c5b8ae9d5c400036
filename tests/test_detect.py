"""Spot detection: sub-pixel accuracy, precision estimates, automatic settings, chunked streaming."""

import math

import numpy as np
import pandas as pd
import pytest
from scipy import special
from scipy.spatial import cKDTree

from msdkit import detect, schema
from msdkit.errors import InputError

SEEDS = [0, 1, 2]


def render(shape, xs, ys, photons, sigma, background, rng, *, gain=1.0, read_sd=0.0, offset=0.0):
    """Frame of pixel-integrated Gaussian spots (erf differences), Poisson noise, camera gain, read noise."""
    ny, nx = shape
    expected = np.full(shape, float(background))
    cols, rows = np.arange(nx), np.arange(ny)
    for x, y, n in zip(xs, ys, np.broadcast_to(photons, len(xs)), strict=True):
        ex = special.ndtr((cols + 0.5 - x) / sigma) - special.ndtr((cols - 0.5 - x) / sigma)
        ey = special.ndtr((rows + 0.5 - y) / sigma) - special.ndtr((rows - 0.5 - y) / sigma)
        expected += n * np.outer(ey, ex)
    out = gain * rng.poisson(expected).astype(float) + offset
    if read_sd:
        out += rng.normal(0.0, read_sd, shape)
    return out


def grid_movie(rng, *, n_frames, sigma, photons, background, shape=(128, 128), spacing=16, **camera):
    """Spots on a jittered grid (isolated) at random sub-pixel positions; returns frames and truth."""
    gx, gy = np.meshgrid(
        np.arange(spacing - 4, shape[1] - 4, spacing), np.arange(spacing - 4, shape[0] - 4, spacing)
    )
    frames, truth = [], []
    for f in range(n_frames):
        xs = gx.ravel() + rng.uniform(-0.5, 0.5, gx.size)
        ys = gy.ravel() + rng.uniform(-0.5, 0.5, gy.size)
        frames.append(render(shape, xs, ys, photons, sigma, background, rng, **camera))
        truth.append(pd.DataFrame({"frame": f, "x": xs, "y": ys}))
    return np.array(frames), pd.concat(truth, ignore_index=True)


def match(spots, truth, radius=2.0):
    """Pair spots with true positions of the same frame (nearest within radius)."""
    out = []
    for f, t in truth.groupby("frame"):
        s = spots[spots["frame"] == f]
        if len(s) == 0:
            continue
        d, j = cKDTree(t[["x", "y"]].to_numpy()).query(s[["x_px", "y_px"]].to_numpy())
        ok = d < radius
        out.append(
            pd.DataFrame(
                {
                    "dx": s["x_px"].to_numpy()[ok] - t["x"].to_numpy()[j[ok]],
                    "dy": s["y_px"].to_numpy()[ok] - t["y"].to_numpy()[j[ok]],
                    "x": t["x"].to_numpy()[j[ok]],
                    "y": t["y"].to_numpy()[j[ok]],
                    "precision_px": s["precision_px"].to_numpy()[ok],
                }
            )
        )
    return pd.concat(out, ignore_index=True)


def test_mortensen_formula_matches_published_check_value():
    # Mortensen et al. 2010 (Nat. Methods 7:377) Eq. 5 at s = 130 nm, a = 100 nm, N = 1000, no background:
    # 4.21 nm (computed; /work/shared/METHODS.md "Localisation error and motion blur")
    sd_px = detect.expected_localization_sd_px(1000, psf_sigma_px=1.3, background_photons_per_px=0.0)
    assert sd_px * 100 == pytest.approx(4.21, abs=0.005)
    # least squares without background is 4/3 worse in SD (Eq. 6: factor 16/9 in variance)
    ls = detect.expected_localization_sd_px(1000, psf_sigma_px=1.3, method="least_squares")
    assert ls / sd_px == pytest.approx(4.0 / 3.0, rel=1e-9)


@pytest.mark.parametrize("seed", SEEDS)
def test_positions_reach_mortensen_precision_without_bias(seed):
    rng = np.random.default_rng(seed)
    sigma, photons, bg = 1.3, 2000.0, 10.0
    frames, truth = grid_movie(rng, n_frames=5, sigma=sigma, photons=photons, background=bg)
    settings = detect.choose_detection_settings(frames)
    spots = detect.locate_spots(frames, settings=settings)
    m = match(spots, truth)
    assert len(m) == len(truth)  # every spot found once
    assert len(spots) == len(truth)  # and nothing else
    crlb = detect.expected_localization_sd_px(photons, psf_sigma_px=sigma, background_photons_per_px=bg)
    err = np.concatenate([m["dx"], m["dy"]])
    n = err.size
    # RMS error of an efficient estimator equals the Cramér–Rao bound (Mortensen 2010, Eq. 5); the sample RMS
    # of
    # n Gaussian errors has relative SD 1/sqrt(2n); allow 4 SD above (a fit cannot beat the bound: 4 SD below)
    rms = float(np.sqrt(np.mean(err**2)))
    tol = 4.0 / math.sqrt(2 * n)
    assert 1.0 - tol < rms / crlb < 1.0 + tol + 0.05  # 5 % for the Gaussian approximation of Poisson weights
    # no bias: mean error within 4 standard errors of zero
    assert abs(np.mean(m["dx"])) < 4 * crlb / math.sqrt(len(m))
    assert abs(np.mean(m["dy"])) < 4 * crlb / math.sqrt(len(m))
    # the per-spot precision estimate agrees with the published bound
    assert float(np.median(m["precision_px"])) == pytest.approx(crlb, rel=0.08)


def test_positions_are_free_of_pixel_locking():
    # bright spots, errors binned by the true sub-pixel phase: each bin mean within 4 SE of zero. A centroid
    # on a
    # small window shows a systematic S-shaped error against phase (common practice).
    rng = np.random.default_rng(11)
    sigma, photons, bg = 1.0, 20000.0, 5.0
    frames, truth = grid_movie(rng, n_frames=10, sigma=sigma, photons=photons, background=bg)
    settings = detect.choose_detection_settings(frames[:4])
    m = match(detect.locate_spots(frames, settings=settings), truth)
    phase = m["x"] - np.round(m["x"])
    bins = np.digitize(phase, [-0.3, -0.1, 0.1, 0.3])
    crlb = detect.expected_localization_sd_px(photons, psf_sigma_px=sigma, background_photons_per_px=bg)
    for b in range(5):
        e = m["dx"][bins == b]
        assert len(e) > 20
        assert abs(e.mean()) < 4 * crlb / math.sqrt(len(e))


@pytest.mark.parametrize("sigma", [0.9, 1.6, 2.6])
def test_auto_spot_size_recovers_psf_width(sigma):
    rng = np.random.default_rng(int(sigma * 10))
    frames, _ = grid_movie(rng, n_frames=4, sigma=sigma, photons=3000.0, background=10.0, spacing=24)
    settings = detect.choose_detection_settings(frames)
    assert "spot_sigma_px" in settings.chosen_automatically
    # the median of ~100 fitted widths: relative SD of one width ~ 2-5 % here, so 3 % is > 4 SE
    assert settings.spot_sigma_px == pytest.approx(sigma, rel=0.03)
    assert settings.spot_diameter_px == pytest.approx(2.3548 * settings.spot_sigma_px, rel=1e-4)


@pytest.mark.parametrize(
    "camera",
    [
        {"background": 20.0},  # photon counting, moderate background
        {"background": 3.0},  # low background: strongly skewed Poisson noise
        {"background": 100.0, "gain": 2.0, "read_sd": 5.0, "offset": 100.0},  # amplified camera with offset
    ],
)
def test_auto_threshold_gives_few_false_spots_on_pure_noise(camera):
    rng = np.random.default_rng(7)
    bg = camera.pop("background")
    frames = np.array([render((128, 128), [], [], 0.0, 1.0, bg, rng, **camera) for _ in range(150)])
    settings = detect.choose_detection_settings(frames[:20], spot_diameter_px=2.3548 * 1.3)
    spots = detect.locate_spots(frames, settings=settings)
    # target 0.01 per frame: 1.5 expected in 150 frames; 8 or more has Poisson probability < 1e-4
    assert settings.false_spots_per_frame == 0.01
    assert len(spots) < 8


def test_dim_in_focus_spots_are_kept():
    # spots 3 noise SDs above the automatic threshold are nearly all found (the matched-filter brightness has
    # a
    # Gaussian error of one mass_noise_sd, so recall should be about Phi(3) = 0.9987)
    rng = np.random.default_rng(3)
    sigma, bg = 1.3, 20.0
    noise_only = np.array([render((128, 128), [], [], 0.0, sigma, bg, rng) for _ in range(5)])
    settings = detect.choose_detection_settings(noise_only, spot_diameter_px=2.3548 * sigma)
    photons = settings.min_mass + 3.0 * settings.mass_noise_sd
    frames, truth = grid_movie(rng, n_frames=10, sigma=sigma, photons=photons, background=bg)
    spots = detect.locate_spots(frames, settings=settings)
    m = match(spots, truth)
    assert len(m) / len(truth) > 0.97
    assert len(spots) - len(m) <= 3  # and hardly anything else


def test_chunked_detection_with_first_frame_equals_whole_movie():
    rng = np.random.default_rng(5)
    frames, _ = grid_movie(rng, n_frames=7, sigma=1.2, photons=800.0, background=15.0)
    settings = detect.choose_detection_settings(frames)
    whole = detect.locate_spots(frames, settings=settings)
    parts = [
        detect.locate_spots(frames[a:b], settings=settings, first_frame=a)
        for a, b in ((0, 3), (3, 6), (6, 7))
    ]
    chunked = pd.concat(parts, ignore_index=True)
    pd.testing.assert_frame_equal(whole, chunked)


def test_spots_table_follows_the_schema():
    rng = np.random.default_rng(9)
    frames, _ = grid_movie(rng, n_frames=2, sigma=1.2, photons=1500.0, background=10.0)
    spots = detect.locate_spots(frames, settings=detect.choose_detection_settings(frames), first_frame=40)
    assert list(spots.columns[: len(schema.SPOT_COLUMNS)]) == list(schema.SPOT_COLUMNS)
    for col, dtype in schema.SPOT_COLUMNS.items():
        assert spots[col].dtype == np.dtype(dtype)
    assert set(spots["frame"]) == {40, 41}
    assert np.allclose(spots["size_px"], math.sqrt(2) * spots["sigma_px"])


def test_empty_frames_give_an_empty_table_with_the_schema_columns():
    rng = np.random.default_rng(2)
    frames = rng.poisson(10.0, (3, 64, 64)).astype(float)
    spots = detect.locate_spots(frames, settings=detect.choose_detection_settings(frames, min_mass=1e9))
    assert len(spots) == 0
    assert list(spots.columns[: len(schema.SPOT_COLUMNS)]) == list(schema.SPOT_COLUMNS)


def test_bad_frames_are_rejected_with_a_clear_message():
    with pytest.raises(InputError, match=r"frames_sample must be a 3-D array .* got shape \(2, 3, 4, 5\)"):
        detect.choose_detection_settings(np.zeros((2, 3, 4, 5)))
    with pytest.raises(InputError, match="finite numbers; got NaN or inf"):
        detect.choose_detection_settings(np.full((2, 16, 16), np.nan))
    with pytest.raises(InputError, match="spot_diameter_px must be a positive number"):
        detect.choose_detection_settings(np.ones((2, 16, 16)), spot_diameter_px=-1)
    with pytest.raises(InputError, match="settings must be a DetectionSettings"):
        detect.locate_spots(np.ones((2, 16, 16)), settings={"min_mass": 3})
