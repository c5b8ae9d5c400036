"""Ensemble drift: estimate, standard error, significance, path model, removal, errors."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from msdkit.drift import DriftEstimate, estimate_drift, remove_drift
from msdkit.errors import InputError
from msdkit.simulate import brownian_positions, directed_positions, positions_to_tracks

DT = 0.05


def _sample(rng, n_tracks=40, n_points=100, v=(0.0, 0.0), D=0.5, sigma=0.05, ragged=True):
    pos = brownian_positions(
        n_tracks,
        n_points,
        D_um2_s=D,
        frame_interval_s=DT,
        exposure_s=DT,
        localization_sd_um=sigma,
        drift_um_s=list(v),
        rng=rng,
    )
    if ragged:
        return positions_to_tracks(
            pos,
            frame_interval_s=DT,
            lengths=rng.integers(30, n_points + 1, n_tracks),
            first_frames=rng.integers(0, 100, n_tracks),
        )
    return positions_to_tracks(pos, frame_interval_s=DT)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_linear_drift_is_recovered_within_its_standard_error(seed):
    # A common drift adds v*t to every particle; the mean displacement estimates it without bias
    # (common practice). 4 SE per component: a false failure has probability ~1e-4.
    rng = np.random.default_rng(seed)
    v = np.array([0.8, -0.6])  # about 10 SE: significant at the 0.1 % level for any seed
    est = estimate_drift(_sample(rng, v=v), frame_interval_s=DT)
    assert isinstance(est, DriftEstimate)
    z = (np.array(est.velocity_um_s) - v) / np.array(est.velocity_se_um_s)
    assert np.all(np.abs(z) < 4)
    assert est.significant and est.safe_to_subtract and est.worth_subtracting
    assert est.model == "linear"


def test_drift_standard_error_matches_the_scatter_over_repeats():
    # SD of z = (v_hat - v)/SE over 80 repeats must be 1; the SD of a sample SD of 80 normal values is
    # ~8 %, so [0.7, 1.35] is a > 3.5-sigma band.
    rng = np.random.default_rng(7)
    z = []
    for _ in range(80):
        est = estimate_drift(_sample(rng, n_tracks=25, n_points=60, v=(0.1, 0.0)), frame_interval_s=DT)
        z.append((np.array(est.velocity_um_s) - [0.1, 0.0]) / np.array(est.velocity_se_um_s))
    sd = np.std(np.array(z), axis=0)
    assert np.all((sd > 0.7) & (sd < 1.35)), sd


def test_no_drift_is_rarely_called_significant():
    # At the 0.1 % level the false-alarm count in 100 null samples stays within a generous binomial bound
    # (rate 0.5 % allowed for the approximations of the tests).
    rng = np.random.default_rng(3)
    n = 100
    hits = sum(
        estimate_drift(_sample(rng, n_tracks=30, n_points=60), frame_interval_s=DT).significant
        for _ in range(n)
    )
    assert hits <= stats.binom.ppf(0.9999, n, 0.005)


def test_path_model_follows_a_nonlinear_drift():
    rng = np.random.default_rng(11)
    n_pts = 300
    pos = brownian_positions(80, n_pts, D_um2_s=0.2, frame_interval_s=DT, localization_sd_um=0.02, rng=rng)
    f = np.arange(n_pts)
    path = np.stack([0.8 * np.sin(2 * np.pi * f / 150), 0.4 * np.cos(2 * np.pi * f / 100)], axis=1)
    tracks = positions_to_tracks(pos + path[None], frame_interval_s=DT)
    est = estimate_drift(tracks, frame_interval_s=DT)
    assert est.model == "path" and est.significant
    truth = path - path[0]
    got = est.path[["drift_x_um", "drift_y_um"]].to_numpy()
    se = est.path[["drift_x_se_um", "drift_y_se_um"]].to_numpy()
    # the smoothed path lags sharp turns a little; allow 4 SE plus 0.05 µm
    assert np.all(np.abs(got - truth) < 4 * se + 0.05)


def test_removing_the_drift_leaves_no_significant_drift():
    rng = np.random.default_rng(5)
    tracks = _sample(rng, v=(0.5, 0.4))
    est = estimate_drift(tracks, frame_interval_s=DT)
    cleaned = remove_drift(tracks, est)
    again = estimate_drift(cleaned, frame_interval_s=DT)
    assert np.all(np.abs(again.velocity_um_s) < 1e-9 + 3 * np.array(again.velocity_se_um_s))
    assert not again.significant
    assert list(cleaned.columns) == list(tracks.columns)
    pd.testing.assert_series_equal(cleaned["frame"], tracks["frame"])


def test_a_few_transported_particles_do_not_make_a_drift():
    # Robust (Huber) weights: 3 actively transported particles among 40 still ones leave the estimate near 0.
    rng = np.random.default_rng(2)
    still = brownian_positions(40, 100, D_um2_s=0.3, frame_interval_s=DT, localization_sd_um=0.02, rng=rng)
    moving = directed_positions(3, 100, D_um2_s=0.3, speed_um_s=3.0, frame_interval_s=DT, rng=rng)
    tracks = positions_to_tracks(np.concatenate([still, moving]), frame_interval_s=DT)
    est = estimate_drift(tracks, frame_interval_s=DT)
    plain = 3 * 3.0 / 43  # what an unweighted mean would give in the direction of motion, µm/s
    assert np.all(np.abs(est.velocity_um_s) < 4 * np.array(est.velocity_se_um_s))
    assert est.speed_um_s < plain
    assert est.n_tracks_sharing <= 41 and not est.significant


def test_too_few_tracks_are_not_safe_to_subtract():
    rng = np.random.default_rng(0)
    est = estimate_drift(
        _sample(rng, n_tracks=4, v=(1.0, 0.0), ragged=False), frame_interval_s=DT, min_tracks=10
    )
    assert not est.safe_to_subtract
    assert "4 tracks" in est.reason


def test_bad_input_gets_a_clear_error():
    with pytest.raises(InputError, match="tracks columns must be"):
        estimate_drift(pd.DataFrame({"track": [0], "frame": [0]}), frame_interval_s=DT)
    rng = np.random.default_rng(0)
    with pytest.raises(InputError, match="frame_interval_s must be > 0"):
        estimate_drift(_sample(rng), frame_interval_s=0.0)
    with pytest.raises(ValueError, match="model must be"):
        estimate_drift(_sample(rng), frame_interval_s=DT, model="spline")
    with pytest.raises(InputError, match="drift must be a DriftEstimate"):
        remove_drift(_sample(rng), {"velocity_um_s": (0, 0)})


# ------------------------------------------------------------------ compiled paths against plain references
@pytest.mark.parametrize("n", [1, 2, 7, 16384, 16385, 70001, 300000])
def test_compiled_median_and_deviation_equal_numpy_median(n):
    # Reference: numpy.median (and numpy.median of |x - median| for the median absolute deviation).
    from msdkit import _msd_kernels as k

    rng = np.random.default_rng(n)
    arrays = [
        rng.normal(size=n),
        rng.integers(0, 3, n).astype(float),  # many ties
        np.sort(rng.standard_cauchy(n)),  # heavy tails, sorted (a strided sample sees every rank)
        np.where(np.arange(n) % 7 == 0, rng.normal(size=n) * 1e3, 0.0),  # the sample sees only zeros
    ]
    for x in arrays:
        assert k.median(x) == np.median(x)
        c = np.median(x)
        assert k.median_abs_deviation(x, c) == np.median(np.abs(x - c))
        assert k.median(x[::3]) == np.median(x[::3])  # strided view


def _reference_steps(tracks, cols):
    """Steps by a pandas group-by on the finite rows sorted by (track, frame): the plain definition."""
    t = tracks[np.all(np.isfinite(tracks[list(cols)].to_numpy(float)), axis=1)]
    t = t.sort_values(["track", "frame"], kind="stable")
    g = t.groupby("track", sort=True)
    d = g[list(cols)].diff().to_numpy()
    df = g["frame"].diff().to_numpy()
    tid = g.ngroup().to_numpy()
    f = t["frame"].to_numpy()
    keep = df > 0
    f0 = np.concatenate([[0], f[:-1]])
    return tid[keep], f0[keep], df[keep].astype(np.int64), d[keep]


def test_compiled_steps_equal_a_pandas_groupby_reference():
    from msdkit.drift import _steps

    rng = np.random.default_rng(4)
    tr = _sample(rng, n_tracks=60, n_points=80)
    tr = tr.drop(index=rng.choice(len(tr), 200, replace=False))  # gaps
    tr.loc[tr.index[rng.choice(len(tr), 15, replace=False)], "y_um"] = np.nan  # missed positions
    tr = tr.sample(frac=1.0, random_state=1)  # rows out of order
    got = _steps(tr, ("x_um", "y_um"))
    ref = _reference_steps(tr, ("x_um", "y_um"))
    for a, b in zip(got, ref, strict=True):
        np.testing.assert_array_equal(a, b)


def test_block_velocities_equal_a_per_block_numpy_reference():
    # Reference: the per-block robust velocity written out with numpy.median and a stable argsort.
    from msdkit.drift import _HUBER_K, _block_velocities, _steps

    rng = np.random.default_rng(5)
    tid, f0, gap, d = _steps(_sample(rng, n_tracks=80, n_points=120, v=(0.3, 0.0)), ("x_um", "y_um"))
    n_blocks = 8
    got_v, got_var = _block_velocities(tid, f0, gap, d, DT, n_blocks, 1.5)
    edges = np.linspace(f0.min(), (f0 + gap).max(), n_blocks + 1)
    blk = np.clip(np.searchsorted(edges, f0, side="right") - 1, 0, n_blocks - 1)
    scales = np.array([1.4826 * np.median(np.abs(d[:, j] - np.median(d[:, j]))) for j in range(2)])
    ref_v, ref_var = [], []
    for b in range(n_blocks):
        sel = blk == b
        if np.unique(tid[sel]).size < 3:
            continue
        dd, G = d[sel], gap[sel].astype(float)
        s = 1.4826 * np.median(np.abs(dd.ravel() - np.median(dd.ravel())))
        w = np.minimum(1.0, _HUBER_K * 3.0 * s / np.maximum(np.abs(dd - np.median(dd, 0)), 1e-300))
        ref_v.append((w * dd).sum(0) / (w * G[:, None]).sum(0) / DT)
        ref_var.append(scales**2 / G.sum() / DT**2 * 1.5)
    np.testing.assert_allclose(got_v, ref_v, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(got_var, ref_var, rtol=1e-12)
