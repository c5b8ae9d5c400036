"""Tests of the MSD engine: exactness against direct sums, gaps, offsets, variance, ensemble definition."""

import numpy as np
import pandas as pd
import pytest

from msdkit.errors import InputError
from msdkit.estimators.diffusion import msd_covariance_terms
from msdkit.msd import ensemble_msd, time_averaged_msd
from msdkit.simulate import brownian_positions, positions_to_tracks


def direct_ta_msd(tracks: pd.DataFrame, cols=("x_um", "y_um")) -> pd.DataFrame:
    """O(N^2) reference: every pair of observed positions n frames apart (common practice)."""
    rows = []
    for tid, g in tracks.groupby("track"):
        g = g.sort_values("frame")
        f = g["frame"].to_numpy()
        xy = g[list(cols)].to_numpy()
        span = f[-1] - f[0] + 1
        grid = np.full((span, len(cols)), np.nan)
        grid[f - f[0]] = xy
        for n in range(1, span):
            d = grid[n:] - grid[:-n]
            ok = ~np.isnan(d[:, 0])
            if ok.any():
                rows.append((tid, n, float((d[ok] ** 2).sum(1).mean()), int(ok.sum())))
    return pd.DataFrame(rows, columns=["track", "lag_frames", "msd_um2", "n_pairs"])


def make_tracks(rng, n_tracks=25, n_points=70, offset_um=0.0, drop=0.0, ragged=False):
    pos = brownian_positions(n_tracks, n_points, D_um2_s=0.5, frame_interval_s=0.02, exposure_s=0.01,
                             localization_sd_um=0.02, rng=rng) + offset_um
    lengths = rng.integers(1, n_points + 1, n_tracks) if ragged else None
    t = positions_to_tracks(pos, frame_interval_s=0.02, lengths=lengths,
                            first_frames=rng.integers(0, 9, n_tracks))
    if drop:
        t = t[rng.random(len(t)) >= drop]
    return t.reset_index(drop=True)


@pytest.mark.parametrize("drop", [0.0, 0.25])
@pytest.mark.parametrize("ragged", [False, True])
def test_fft_msd_equals_direct_sum_with_missing_frames_and_large_offsets(drop, ragged):
    # Calandrini et al. 2011 (FFT algorithm) vs the defining sum; 1e4 µm offsets (METHODS.md: mean-subtract)
    rng = np.random.default_rng(11)
    t = make_tracks(rng, offset_um=1e4, drop=drop, ragged=ragged)
    got = time_averaged_msd(t)
    ref = direct_ta_msd(t)
    assert len(got) == len(ref)
    np.testing.assert_array_equal(got[["track", "lag_frames", "n_pairs"]].to_numpy(),
                                  ref[["track", "lag_frames", "n_pairs"]].to_numpy())
    np.testing.assert_allclose(got["msd_um2"].to_numpy(), ref["msd_um2"].to_numpy(), rtol=1e-9)


def test_row_order_and_nan_positions_do_not_change_the_msd():
    rng = np.random.default_rng(3)
    t = make_tracks(rng, drop=0.1)
    shuffled = t.sample(frac=1.0, random_state=4)
    a = time_averaged_msd(t)
    b = time_averaged_msd(shuffled)
    pd.testing.assert_frame_equal(a, b)
    # a non-finite position is a missed frame
    with_nan = t.copy()
    with_nan.loc[5, "x_um"] = np.nan
    pd.testing.assert_frame_equal(time_averaged_msd(with_nan), time_averaged_msd(t.drop(index=5)))


def test_max_lag_limits_rows_and_keeps_values():
    rng = np.random.default_rng(5)
    t = make_tracks(rng, ragged=True)
    full = time_averaged_msd(t)
    cut = time_averaged_msd(t, max_lag_frames=7)
    assert cut["lag_frames"].max() == 7
    pd.testing.assert_frame_equal(cut.reset_index(drop=True),
                                  full[full["lag_frames"] <= 7].reset_index(drop=True))


def test_three_dimensional_msd_sums_three_coordinates():
    rng = np.random.default_rng(6)
    pos = brownian_positions(4, 30, D_um2_s=1.0, frame_interval_s=0.01, n_dims=3, rng=rng)
    t = positions_to_tracks(pos, frame_interval_s=0.01)
    got = time_averaged_msd(t, n_dims=3)
    ref = direct_ta_msd(t, cols=("x_um", "y_um", "z_um"))
    np.testing.assert_allclose(got["msd_um2"].to_numpy(), ref["msd_um2"].to_numpy(), rtol=1e-9)


def test_single_point_tracks_have_no_rows_and_empty_input_gives_empty_table():
    t = pd.DataFrame({"track": [1, 2, 2], "frame": [0, 0, 1], "x_um": [0.0, 0.0, 1.0],
                      "y_um": [0.0, 0.0, 0.0]})
    got = time_averaged_msd(t)
    assert got["track"].tolist() == [2] and got["msd_um2"].tolist() == [1.0]
    assert len(time_averaged_msd(t.iloc[:0])) == 0


def test_duplicate_frame_in_a_track_is_rejected_with_a_clear_message():
    t = pd.DataFrame({"track": [1, 1, 1], "frame": [0, 2, 2], "x_um": [0.0, 1, 2], "y_um": [0.0, 0, 0]})
    with pytest.raises(InputError, match="track 1 has frame 2 twice"):
        time_averaged_msd(t)


def test_missing_position_column_is_rejected_with_a_clear_message():
    t = pd.DataFrame({"track": [1, 1], "frame": [0, 1], "x_um": [0.0, 1.0]})
    with pytest.raises(InputError, match=r"missing column\(s\) \['y_um'\]"):
        time_averaged_msd(t)


def test_relative_variance_of_ta_msd_matches_qian_1991():
    # Qian, Sheetz & Elson 1991, Biophys. J. 60:910: 2D, N_s = 20 steps: n = 1 -> 0.05, n = 10 -> 0.47273
    Qbb, _, _ = msd_covariance_terms(20, 20)
    assert Qbb[0, 0] / 2 == pytest.approx(0.05, rel=1e-12)
    assert Qbb[9, 9] / (2 * 100) == pytest.approx(0.47273, abs=5e-6)
    # and the engine's TA-MSD of simulated tracks has that spread
    M = 8000
    pos = brownian_positions(M, 21, D_um2_s=1.0, frame_interval_s=1.0, rng=np.random.default_rng(8))
    ta = time_averaged_msd(positions_to_tracks(pos, frame_interval_s=1.0), max_lag_frames=10)
    for n, ratio in ((1, 0.05), (10, 0.47273)):
        v = ta.loc[ta["lag_frames"] == n, "msd_um2"].to_numpy()
        rel = v.var(ddof=1) / (4.0 * n) ** 2
        # SE of a variance estimate ~ sqrt((kurtosis - 1)/M) relative; kurtosis <= 9 for these sums
        assert rel == pytest.approx(ratio, rel=5 * np.sqrt(8 / M))


def test_ensemble_msd_is_the_pair_weighted_mean_with_track_level_errors():
    rng = np.random.default_rng(9)
    t = make_tracks(rng, ragged=True, drop=0.1)
    ta = time_averaged_msd(t, max_lag_frames=5)
    ens = ensemble_msd(t, frame_interval_s=0.02, max_lag_frames=5)
    for n in range(1, 6):
        s = ta[ta["lag_frames"] == n]
        w = s["n_pairs"].to_numpy()
        y = s["msd_um2"].to_numpy()
        mean = np.sum(w * y) / np.sum(w)
        T = len(s)
        sem = np.sqrt(T / (T - 1) * np.sum((w * (y - mean)) ** 2)) / np.sum(w)
        row = ens[ens["lag_frames"] == n].iloc[0]
        assert row["msd_um2"] == pytest.approx(mean, rel=1e-12)
        assert row["sem_um2"] == pytest.approx(sem, rel=1e-12)
        assert row["n_tracks"] == T and row["n_pairs"] == w.sum()
        assert row["ta_msd_um2"] == pytest.approx(y.mean(), rel=1e-12)
        assert row["lag_s"] == pytest.approx(0.02 * n)


def test_ensemble_msd_of_blurred_noisy_brownian_motion_follows_berglund_offset():
    # MSD = 2d [D (t - t_E/3) + sigma^2] (Berglund 2010; Savin & Doyle 2005)
    D, dt, tE, sig = 0.8, 0.05, 0.05, 0.1
    pos = brownian_positions(3000, 40, D_um2_s=D, frame_interval_s=dt, exposure_s=tE, localization_sd_um=sig,
                             rng=np.random.default_rng(12))
    ens = ensemble_msd(positions_to_tracks(pos, frame_interval_s=dt), frame_interval_s=dt, max_lag_frames=8)
    expect = 4 * (D * (ens["lag_s"] - tE / 3) + sig**2)
    z = (ens["msd_um2"] - expect) / ens["sem_um2"]
    assert np.all(np.abs(z) < 4.5)


# ------------------------------------------------------------ compiled helpers and the streamed table reader

def test_compiled_lag_sums_equal_the_direct_sum_over_pairs():
    # Reference: the sum over i of |r(i + n) - r(i)|^2 written out with numpy for every lag (common practice).
    from msdkit._msd_kernels import lag_square_sums

    rng = np.random.default_rng(2)
    Q = np.cumsum(rng.normal(size=(7, 40, 2)), axis=1)
    ref = np.stack([((Q[:, n:] - Q[:, :-n]) ** 2).sum(axis=(1, 2)) for n in range(1, 13)], axis=1)
    np.testing.assert_allclose(lag_square_sums(Q, 12), ref, rtol=1e-13)


def test_parquet_read_by_row_group_equals_pandas_read_and_sort(tmp_path):
    # Reference: pandas.read_parquet of the same file, sorted by (track, frame).
    from msdkit.io.tables import read_track_table

    rng = np.random.default_rng(3)
    pos = brownian_positions(40, 60, D_um2_s=0.5, frame_interval_s=0.1, rng=rng)
    tr = positions_to_tracks(pos, frame_interval_s=0.1)[["track", "frame", "x_um", "y_um"]]
    tr = tr.sample(frac=1.0, random_state=4).reset_index(drop=True)
    path = tmp_path / "t.parquet"
    tr.to_parquet(path, row_group_size=500)  # several row groups
    got = read_track_table(path, frame_interval_s=0.1)
    ref = pd.read_parquet(path).sort_values(["track", "frame"]).reset_index(drop=True)
    for c in ("track", "frame", "x_um", "y_um"):
        np.testing.assert_array_equal(got[c].to_numpy(), ref[c].to_numpy())
    np.testing.assert_array_equal(got["time_s"].to_numpy(), ref["frame"].to_numpy() * 0.1)
    # an error in a later row group names the row in the whole file
    tr.loc[1234, "x_um"] = np.inf
    tr.to_parquet(path, row_group_size=500)
    with pytest.raises(InputError, match="first in data row 1235"):
        read_track_table(path, frame_interval_s=0.1)


def test_compiled_ensemble_sums_equal_numpy_bincount():
    # Reference: numpy.bincount of the per-track rows, the plain way to sum per lag.
    from msdkit import _msd_kernels as k

    rng = np.random.default_rng(5)
    lag = rng.integers(1, 30, 5000)
    y, w = rng.gamma(2.0, size=5000), rng.integers(1, 50, 5000).astype(float)
    n_tr, sw, swy, sy = k.ensemble_sums(lag, y, w, 30)
    np.testing.assert_array_equal(n_tr, np.bincount(lag, minlength=30))
    np.testing.assert_array_equal(sw, np.bincount(lag, weights=w, minlength=30))
    np.testing.assert_array_equal(swy, np.bincount(lag, weights=w * y, minlength=30))
    np.testing.assert_array_equal(sy, np.bincount(lag, weights=y, minlength=30))
    mean = np.where(sw > 0, swy / np.where(sw > 0, sw, 1.0), 0.0)
    resid = w * (y - mean[lag])
    np.testing.assert_array_equal(k.ensemble_spread(lag, y, w, mean, 30),
                                  np.bincount(lag, weights=resid * resid, minlength=30))
