"""Motion models, per-track classes and sample flags, checked against published laws and known truth."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from msdkit.classify import CLASS_COLUMNS, SampleMotion, classify_tracks, sample_motion
from msdkit.drift import estimate_drift, remove_drift
from msdkit.errors import InputError
from msdkit.motion_models import (
    brownian_msd_um2,
    confined_msd_um2,
    directed_msd_um2,
    expected_periodogram,
    fbm_msd_um2,
    fit_step_models,
    periodograms,
    split_cosine_taper,
    ta_msd_relative_variance,
)
from msdkit.schema import MOTION_CLASSES
from msdkit.simulate import (
    brownian_positions,
    confined_positions,
    directed_positions,
    fbm_positions,
    positions_to_tracks,
)

DT = 0.03


def _tracks(pos):
    return positions_to_tracks(pos, frame_interval_s=DT)


# ------------------------------------------------------------------------------------------ MSD laws
def test_confined_msd_levels_off_at_L2_over_6_per_axis():
    # Saxton & Jacobson 1997 (Annu. Rev. Biophys. Biomol. Struct. 26:373): plateau L²/6 per axis, i.e.
    # (L²/3)(1 - exp(-12 D t / L²)) in 2D; both forms start with slope 2dD.
    L, D = 0.8, 0.5
    t = np.array([1e-5, 100.0])
    for exact in (True, False):
        m = confined_msd_um2(t, D_um2_s=D, box_um=L, n_dims=2, exact=exact)
        assert m[1] == pytest.approx(L**2 / 3, rel=1e-9)
        assert m[0] / t[0] == pytest.approx(4 * D, rel=2e-2)
    approx = confined_msd_um2(np.array([0.02]), D_um2_s=D, box_um=L, exact=False)
    assert approx[0] == pytest.approx(L**2 / 3 * (1 - np.exp(-12 * D * 0.02 / L**2)))


def test_simulated_confined_motion_reaches_the_plateau():
    # Plateau of the time-averaged MSD of reflected motion in a box, per axis L²/6 (Saxton & Jacobson 1997).
    rng = np.random.default_rng(1)
    L = 0.6
    pos = confined_positions(200, 400, D_um2_s=1.0, box_um=L, frame_interval_s=DT, rng=rng)
    lag = 200
    msd_x = np.mean((pos[:, lag:, 0] - pos[:, :-lag, 0]) ** 2)
    assert msd_x == pytest.approx(L**2 / 6, rel=0.05)


def test_directed_msd_is_4Dt_plus_v2t2():
    # MSD = 4Dt + v²t² in 2D (common practice; Saxton & Jacobson 1997), formula and simulation.
    D, v = 0.2, 1.5
    t = np.array([0.1, 1.0])
    assert np.allclose(directed_msd_um2(t, D_um2_s=D, speed_um_s=v), 4 * D * t + v**2 * t**2)
    rng = np.random.default_rng(2)
    pos = directed_positions(4000, 11, D_um2_s=D, speed_um_s=v, frame_interval_s=DT, rng=rng)
    n = 10
    ea = np.sum((pos[:, n] - pos[:, 0]) ** 2, axis=1)
    expect = 4 * D * n * DT + (v * n * DT) ** 2
    # ensemble mean over 4000 tracks: relative SE about 1.6 %, 5 SE tolerance
    assert ea.mean() == pytest.approx(expect, rel=5 * ea.std() / ea.mean() / np.sqrt(ea.size))


def test_blurred_power_law_with_alpha_1_is_the_berglund_msd():
    # Berglund 2010 (Phys. Rev. E 82:011917): MSD = 2d[D(t - t_E/3) + sigma²] for uniform exposure.
    t = np.arange(1, 20) * DT
    a = fbm_msd_um2(t, K_um2_s_alpha=0.7, alpha=1.0, sigma_um=0.03, exposure_s=0.02)
    b = brownian_msd_um2(t, D_um2_s=0.7, sigma_um=0.03, exposure_s=0.02)
    assert np.allclose(a, b, rtol=1e-9)
    assert np.allclose(b, 4 * (0.7 * (t - 0.02 / 3) + 0.03**2))


def test_time_averaged_msd_variance_equals_qian_ratio():
    # Qian, Sheetz & Elson 1991 (Biophys. J. 60:910) via METHODS.md: N_s = 20 steps, n = 1 -> 0.05,
    # n = 10 -> 0.47273 (2D Brownian, no noise).
    M = 2.0 * np.arange(21)  # per-axis MSD 2 D n with D dt = 1
    assert ta_msd_relative_variance(M, 1, 20) == pytest.approx(0.05, rel=1e-9)
    assert ta_msd_relative_variance(M, 10, 20) == pytest.approx(0.47273, rel=1e-4)
    K = 20
    for n in (2, 5, 15):
        k = K - n + 1
        qian = (
            (4 * n**2 * k + 2 * k + n - n**3) / (6 * n * k**2)
            if n <= k
            else 1 + (k**3 - 4 * n * k**2 + 4 * n - k) / (6 * n**2 * k)
        )
        assert ta_msd_relative_variance(M, n, K) == pytest.approx(qian, rel=1e-9)


@pytest.mark.parametrize("alpha, exposure", [(0.5, 0.0), (1.4, DT)])
def test_expected_periodogram_matches_the_mean_over_simulated_tracks(alpha, exposure):
    # Debiased Whittle (Sykulski et al. 2019, Biometrika 106:251): E[periodogram] is exact for finite N.
    rng = np.random.default_rng(3)
    N = 64
    pos = fbm_positions(
        3000,
        N + 1,
        alpha=alpha,
        K_um2_s_alpha=1.0,
        frame_interval_s=DT,
        exposure_s=exposure,
        localization_sd_um=0.05,
        rng=rng,
    )
    h = split_cosine_taper(N)
    P = periodograms(np.diff(pos, axis=1), h) / 2  # per axis
    t = np.arange(N + 1) * DT
    M = fbm_msd_um2(t, K_um2_s_alpha=1.0, alpha=alpha, sigma_um=0.05, exposure_s=exposure, n_dims=1)
    expect = expected_periodogram(M, h)
    mean = P.mean(axis=0)
    se = P.std(axis=0) / np.sqrt(P.shape[0])
    # the blurred simulator averages 11 sub-frame points, the formula a continuous exposure: 2 % allowance
    assert np.all(np.abs(mean - expect) < 5 * se + 0.02 * expect)


def test_profile_interval_of_alpha_covers_the_truth():
    # 95 % profile-likelihood interval: coverage over 300 FBM tracks stays within a binomial band.
    rng = np.random.default_rng(4)
    pos = fbm_positions(
        300,
        201,
        alpha=0.6,
        K_um2_s_alpha=1.0,
        frame_interval_s=1.0,
        exposure_s=0.0,
        localization_sd_um=0.5,
        rng=rng,
    )
    f = fit_step_models(np.diff(pos, axis=1), exposure_ratio=0.0)
    cover = np.mean((f.alpha_lo <= 0.6) & (f.alpha_hi >= 0.6))
    assert cover >= stats.binom.ppf(0.0005, 300, 0.93) / 300
    assert abs(np.median(f.alpha) - 0.6) < 0.05


# ------------------------------------------------------------------------------------ per-track classes
def test_output_has_the_documented_columns_and_classes():
    rng = np.random.default_rng(0)
    pos = brownian_positions(5, 60, D_um2_s=0.5, frame_interval_s=DT, rng=rng)
    tracks = _tracks(pos)
    tracks = pd.concat(
        [
            tracks,
            pd.DataFrame(
                {
                    "track": [99] * 4,
                    "frame": [0, 1, 2, 3],
                    "time_s": 0.0,
                    "x_um": 0.0,
                    "y_um": [0.0, 0.1, 0.2, 0.1],
                }
            ),
        ]
    )
    out = classify_tracks(tracks, frame_interval_s=DT, exposure_s=0.0)
    assert list(out.columns) == list(CLASS_COLUMNS)
    assert set(out["motion_class"]) <= set(MOTION_CLASSES)
    assert out.set_index("track").loc[99, "motion_class"] == "undetermined"  # too short to tell


def test_brownian_tracks_are_mostly_called_normal():
    # Per-track false alarms: anomalous at 5 % (alpha interval excludes 1) plus confined and directed at
    # 1 % each -> at most ~8 % non-normal; binomial bound at 10 % for 600 tracks.
    rng = np.random.default_rng(5)
    pos = np.concatenate(
        [
            brownian_positions(
                300,
                100,
                D_um2_s=0.5,
                frame_interval_s=DT,
                exposure_s=DT,
                localization_sd_um=np.sqrt(x * 0.5 * DT),
                rng=rng,
            )
            for x in (0.0, 2.0)
        ]
    )
    out = classify_tracks(_tracks(pos), frame_interval_s=DT, exposure_s=DT)
    wrong = np.sum(~out["motion_class"].isin(["normal", "undetermined"]))
    assert wrong <= stats.binom.ppf(0.9995, 600, 0.10)
    # alpha interval covers 1 about 95 % of the time
    cover = np.mean((out.alpha_ci95_lo <= 1) & (out.alpha_ci95_hi >= 1))
    assert cover >= stats.binom.ppf(0.0005, 600, 0.94) / 600


@pytest.mark.parametrize("cls", ["subdiffusive", "superdiffusive", "confined", "directed", "immobile"])
def test_each_class_is_recognised_at_300_points(cls):
    # Clear cases of each model at 300 points, x = 1: ~90 % recognised (binomial bound for 80 tracks).
    rng = np.random.default_rng(6)
    n, N, D = 80, 300, 0.5
    s = np.sqrt(D * DT)
    if cls == "subdiffusive":
        pos = fbm_positions(
            n, N, alpha=0.4, K_um2_s_alpha=D, frame_interval_s=DT, localization_sd_um=s, rng=rng
        )
    elif cls == "superdiffusive":
        pos = fbm_positions(
            n, N, alpha=1.6, K_um2_s_alpha=D, frame_interval_s=DT, localization_sd_um=s, rng=rng
        )
    elif cls == "confined":
        pos = confined_positions(
            n,
            N,
            D_um2_s=D,
            box_um=np.sqrt(12 * D * 4 * DT),
            frame_interval_s=DT,
            localization_sd_um=s,
            rng=rng,
        )
    elif cls == "directed":
        pos = directed_positions(
            n,
            N,
            D_um2_s=D,
            speed_um_s=0.8 * np.sqrt(D / DT),
            frame_interval_s=DT,
            localization_sd_um=s,
            rng=rng,
        )
    else:
        pos = 0.03 * rng.standard_normal((n, N, 2))
    out = classify_tracks(_tracks(pos), frame_interval_s=DT, exposure_s=0.0)
    hits = int(np.sum(out["motion_class"] == cls))
    assert hits >= stats.binom.ppf(0.001, n, 0.9), out["motion_class"].value_counts()


def test_confinement_size_and_speed_are_recovered():
    rng = np.random.default_rng(8)
    L = 0.5
    pos = confined_positions(
        60, 500, D_um2_s=0.5, box_um=L, frame_interval_s=DT, localization_sd_um=0.02, rng=rng
    )
    out = classify_tracks(_tracks(pos), frame_interval_s=DT, exposure_s=0.0)
    conf = out[out.motion_class == "confined"]
    assert len(conf) >= 50
    assert np.median(conf.confinement_um) == pytest.approx(L, rel=0.1)
    v = 1.0
    pos = directed_positions(
        60, 300, D_um2_s=0.1, speed_um_s=v, frame_interval_s=DT, localization_sd_um=0.02, rng=rng
    )
    out = classify_tracks(_tracks(pos), frame_interval_s=DT, exposure_s=0.0)
    d = out[out.motion_class == "directed"]
    assert len(d) >= 55
    assert np.median(d.speed_um_s) == pytest.approx(v, rel=0.1)


def test_bad_input_gets_a_clear_error():
    with pytest.raises(InputError, match="tracks columns must be"):
        classify_tracks(pd.DataFrame({"track": [0]}), frame_interval_s=DT)
    rng = np.random.default_rng(0)
    tracks = _tracks(brownian_positions(2, 20, D_um2_s=0.5, frame_interval_s=DT, rng=rng))
    with pytest.raises(InputError, match="exposure_s must be between 0 and frame_interval_s"):
        classify_tracks(tracks, frame_interval_s=DT, exposure_s=2 * DT)
    with pytest.raises(ValueError, match="penalties keys must be"):
        classify_tracks(tracks, frame_interval_s=DT, penalties={"brownian": 1.0})
    with pytest.raises(InputError, match="track_classes must be"):
        sample_motion(tracks, pd.DataFrame(), frame_interval_s=DT)


# -------------------------------------------------------------------------------------------- samples
def _brownian_sample(rng, n_tracks=30, x=None, drift=None):
    x = rng.uniform(0, 3) if x is None else x
    pos = brownian_positions(
        n_tracks,
        120,
        D_um2_s=0.5,
        frame_interval_s=DT,
        exposure_s=DT,
        localization_sd_um=np.sqrt(x * 0.5 * DT),
        drift_um_s=drift,
        rng=rng,
    )
    return positions_to_tracks(pos, frame_interval_s=DT, lengths=rng.integers(60, 121, n_tracks))


def _motion(tracks, drift=None):
    cls = classify_tracks(tracks, frame_interval_s=DT, exposure_s=DT)
    return sample_motion(tracks, cls, None, drift, frame_interval_s=DT, exposure_s=DT, n_boot=200, rng=0)


def test_brownian_samples_are_rarely_flagged_subdiffusive():
    # Target <= 5 % false `subdiffusive` (noise x up to 3): at most binom.ppf(0.999, 30, 0.05) of 30 samples.
    rng = np.random.default_rng(9)
    flags = [_motion(_brownian_sample(rng)).flags for _ in range(30)]
    assert sum("subdiffusive" in f for f in flags) <= stats.binom.ppf(0.999, 30, 0.05)
    assert sum("superdiffusive" in f for f in flags) <= stats.binom.ppf(0.999, 30, 0.05)


def test_fbm_samples_with_alpha_0p6_are_flagged_subdiffusive():
    # Target >= 95 % detection for alpha <= 0.7: at least binom.ppf(0.001, 20, 0.95) of 20 samples.
    rng = np.random.default_rng(10)
    hits = 0
    for _ in range(20):
        pos = fbm_positions(
            30,
            120,
            alpha=0.6,
            K_um2_s_alpha=0.5,
            frame_interval_s=DT,
            exposure_s=DT,
            localization_sd_um=np.sqrt(rng.uniform(0, 3) * 0.5 * DT**0.6),
            rng=rng,
        )
        m = _motion(_tracks(pos))
        hits += "subdiffusive" in m.flags
        assert m.alpha_ci95[0] <= m.alpha <= m.alpha_ci95[1]
    assert hits >= stats.binom.ppf(0.001, 20, 0.95)


def test_drifting_sample_is_not_superdiffusive_after_correction():
    rng = np.random.default_rng(11)
    for _ in range(5):
        tracks = _brownian_sample(rng, n_tracks=40, x=1.0, drift=[1.5, -1.0])
        drift = estimate_drift(tracks, frame_interval_s=DT)
        assert drift.significant and drift.safe_to_subtract
        m = _motion(remove_drift(tracks, drift), drift)
        assert "drift" in m.flags
        assert "superdiffusive" not in m.flags
        assert m.drift_corrected


def test_ergodicity_breaking_of_brownian_tracks_equals_qian_ratio():
    # EB = Var/mean² of TA-MSD over tracks equals Qian's ratio for Brownian motion (Qian et al. 1991;
    # Metzler et al. 2014, Phys. Chem. Chem. Phys. 16:24128). 400 tracks: relative SE of EB ~ 7 %.
    rng = np.random.default_rng(12)
    pos = brownian_positions(400, 41, D_um2_s=0.5, frame_interval_s=DT, rng=rng)
    m = _motion(_tracks(pos))
    qian = ta_msd_relative_variance(2 * np.arange(41.0), 1, 40)  # Qian, n = 1: (4K + 2K)/(6K²) = 1/K
    assert qian == pytest.approx(1 / 40)
    assert m.ergodicity_breaking_brownian == pytest.approx(qian, rel=0.05)
    assert m.ergodicity_breaking == pytest.approx(qian, rel=0.3)
    assert "nonergodic" not in m.flags and "heterogeneous" not in m.flags


def test_non_gaussian_parameter_is_zero_for_brownian_steps():
    # Non-Gaussian parameter of Gaussian displacements is 0 (Rahman 1964; common practice).
    rng = np.random.default_rng(13)
    m = _motion(_brownian_sample(rng, n_tracks=60, x=1.0))
    assert isinstance(m, SampleMotion)
    assert abs(m.non_gaussian) < 4 * m.non_gaussian_se + 0.02
    assert abs(m.non_gaussian_within) < 0.1


def test_mixture_of_two_diffusion_coefficients_is_heterogeneous():
    rng = np.random.default_rng(14)
    D = np.where(np.arange(60) % 2 == 0, 0.1, 1.0)
    pos = brownian_positions(60, 150, D_um2_s=D, frame_interval_s=DT, localization_sd_um=0.02, rng=rng)
    m = _motion(_tracks(pos))
    assert "heterogeneous" in m.flags
    assert m.numbers["amplitude_spread"] > 0.5
    assert m.non_gaussian > 0.3  # a mixture of Gaussians has positive excess kurtosis


def test_few_tracks_are_flagged():
    rng = np.random.default_rng(15)
    m = _motion(_brownian_sample(rng, n_tracks=5))
    assert "few_tracks" in m.flags
    assert m.numbers["n_tracks_used"] <= 5
    d = m.to_dict()
    assert d["flags"] == list(m.flags) and "msd_comparison" in d


# ------------------------------------------------------------------------------- ensemble alpha, robustly
# Brownian motion has alpha = 1 and fractional Brownian motion its own alpha at every length (Einstein 1905;
# Mandelbrot & Van Ness 1968; Metzler & Klafter 2000, Phys. Rep. 339:1). The ensemble alpha pools many tracks;
# the tolerances below are >= 3.5 times its SD at these sizes (bootstrap SD 0.02-0.03, as the Cramér-Rao bound
# for alpha in METHODS.md, ~0.2 per track of 20 points, shrinks with the square root of the number of tracks).
def _sample_alpha(tracks, exposure_s):
    cls = classify_tracks(tracks, frame_interval_s=DT, exposure_s=exposure_s)
    return sample_motion(tracks, cls, frame_interval_s=DT, exposure_s=exposure_s, n_boot=200, rng=0)


def test_sample_alpha_of_many_short_brownian_tracks_is_unbiased():
    # Summing per-track profile likelihoods (own scale and noise per track) gave alpha ~ 1.2 here.
    rng = np.random.default_rng(16)
    pos = brownian_positions(
        600, 12, D_um2_s=0.5, frame_interval_s=DT, exposure_s=DT / 2, localization_sd_um=0.02, rng=rng
    )
    m = _sample_alpha(_tracks(pos), DT / 2)
    assert abs(m.alpha - 1.0) < 0.12
    assert "superdiffusive" not in m.flags and "subdiffusive" not in m.flags
    # short Brownian tracks that look directed by chance do not flag the sample
    assert "directed" not in m.flags and "confined" not in m.flags


def test_missed_frames_do_not_fake_superdiffusion():
    # 30 % of positions missing at random: filling them by interpolation gave alpha ~ 1.15.
    rng = np.random.default_rng(17)
    pos = brownian_positions(
        300, 60, D_um2_s=0.5, frame_interval_s=DT, exposure_s=DT, localization_sd_um=0.02, rng=rng
    )
    tracks = _tracks(pos)
    tracks = tracks[rng.uniform(size=len(tracks)) > 0.3].reset_index(drop=True)
    m = _sample_alpha(tracks, DT)
    assert abs(m.alpha - 1.0) < 0.1
    assert "superdiffusive" not in m.flags
    assert m.numbers["n_runs_alpha"] > m.numbers["n_tracks_alpha"]


def test_sample_alpha_holds_for_mixed_D_lengths_and_stuck_particles():
    # D spread 50-fold, fast particles give short tracks (as when they leave the focus), a third of the
    # particles stuck (localisation noise only): every track's own scale and noise, one alpha = 1.
    rng = np.random.default_rng(18)
    D = np.exp(rng.uniform(np.log(0.1), np.log(5.0), 300))
    lengths = np.clip((60 / np.sqrt(D)).astype(int), 8, 200)
    pos = brownian_positions(
        300, 200, D_um2_s=D, frame_interval_s=DT, exposure_s=DT / 2, localization_sd_um=0.03, rng=rng
    )
    stuck = 0.03 * rng.standard_normal((150, 200, 2))
    tracks = positions_to_tracks(
        np.concatenate([pos, stuck]), frame_interval_s=DT, lengths=np.concatenate([lengths, np.full(150, 80)])
    )
    m = _sample_alpha(tracks, DT / 2)
    assert abs(m.alpha - 1.0) < 0.1
    assert m.alpha_ci95[0] <= m.alpha <= m.alpha_ci95[1]


def test_short_fbm_tracks_give_their_alpha_and_the_subdiffusive_flag():
    rng = np.random.default_rng(19)
    pos = fbm_positions(
        400, 15, alpha=0.5, K_um2_s_alpha=0.5, frame_interval_s=DT, exposure_s=DT,
        localization_sd_um=0.02, rng=rng,
    )
    m = _sample_alpha(_tracks(pos), DT)
    assert abs(m.alpha - 0.5) < 0.12
    assert "subdiffusive" in m.flags


def test_alpha_given_the_sample_beats_the_single_track_value_on_short_tracks():
    # Empirical Bayes (Robbins 1956; Laird 1978): with many short tracks of one alpha, each track's alpha
    # given the spread over all tracks is far closer to the truth than its own maximum-likelihood value.
    rng = np.random.default_rng(20)
    pos = fbm_positions(
        300, 15, alpha=0.5, K_um2_s_alpha=0.5, frame_interval_s=DT, exposure_s=DT,
        localization_sd_um=0.02, rng=rng,
    )
    out = classify_tracks(_tracks(pos), frame_interval_s=DT, exposure_s=DT)
    err_post = np.nanmean(np.abs(out["alpha_posterior"] - 0.5))
    err_own = np.nanmean(np.abs(out["alpha"] - 0.5))
    assert err_post < 0.5 * err_own
    assert err_post < 0.15


def test_alpha_given_the_sample_keeps_two_kinds_of_motion_apart():
    rng = np.random.default_rng(21)
    sub = fbm_positions(100, 100, alpha=0.4, K_um2_s_alpha=0.5, frame_interval_s=DT, localization_sd_um=0.02,
                        rng=rng)
    brown = brownian_positions(100, 100, D_um2_s=0.5, frame_interval_s=DT, localization_sd_um=0.02, rng=rng)
    out = classify_tracks(_tracks(np.concatenate([sub, brown])), frame_interval_s=DT, exposure_s=0.0)
    # Two groups stay two groups. The subdiffusive tracks' own likelihoods are flat between alpha ~0.3 and 1
    # (at 100 points, a low alpha and localisation noise both make steps anti-correlated), so given the
    # Brownian half of the sample they are drawn part of the way towards 1, never onto it.
    post = out["alpha_posterior"].to_numpy()
    assert np.mean(post[:100]) < 0.7
    assert abs(np.mean(post[100:]) - 1.0) < 0.1
    assert np.mean(post[100:]) - np.mean(post[:100]) > 0.3


def test_runs_of_consecutive_frames_do_not_depend_on_row_order():
    # Reference: the same table sorted by pandas (track, frame); a shuffled copy must give the same runs.
    from msdkit.classify import _contiguous_runs

    g = np.random.default_rng()
    frames = np.concatenate([np.delete(np.arange(40), g.choice(40, 4, replace=False)) for _ in range(30)])
    tracks = pd.DataFrame({"track": np.repeat(np.arange(30), 36), "frame": frames,
                           "x_um": g.normal(size=frames.size), "y_um": g.normal(size=frames.size)})
    keep = np.arange(0, 30, 2)
    runs_a, own_a = _contiguous_runs(tracks.sort_values(["track", "frame"]), keep, min_run_points=3)
    runs_b, own_b = _contiguous_runs(tracks.sample(frac=1.0, random_state=3), keep, min_run_points=3)
    np.testing.assert_array_equal(own_a, own_b)
    assert len(runs_a) == len(runs_b) > 0
    for a, b in zip(runs_a, runs_b):
        np.testing.assert_array_equal(a, b)


# ------------------------------------------------------------- fast paths equal the direct computation
def _mixed_table(g, n_tracks=24, n_frames=60):
    """Tracks of two lengths, some with missed frames and one NaN row, rows in (track, frame) order."""
    pos = brownian_positions(n_tracks, n_frames, D_um2_s=0.4, frame_interval_s=DT, exposure_s=DT,
                             localization_sd_um=0.02, rng=g)
    t = positions_to_tracks(pos, frame_interval_s=DT, lengths=np.where(np.arange(n_tracks) % 3 == 0, 40, 60))
    drop = []
    for tr in (2, 7):  # missed frames inside two tracks
        rows = np.flatnonzero(t["track"].to_numpy() == tr)
        drop += [rows[10], rows[11], rows[30]]
    t = t.drop(index=t.index[drop]).reset_index(drop=True)
    t.loc[t.index[t["track"].to_numpy() == 5][20], "x_um"] = np.nan
    return t


def test_grouped_step_statistics_equal_the_per_track_function():
    # Reference: the per-track statistics (numpy.diff, numpy.cov, numpy.linalg.eigvalsh on one track at a
    # time); the grouped, blocked and no-copy path must give the same numbers to rounding.
    from msdkit.classify import _step_statistics, _step_statistics_all, _track_arrays

    arr = _track_arrays(_mixed_table(np.random.default_rng()))
    fast = _step_statistics_all(arr.positions, arr.xyz, arr.starts, arr.gapped)
    direct = np.array([_step_statistics(p) for p in arr.positions])
    np.testing.assert_allclose(fast, direct, rtol=1e-10, atol=1e-14)


def test_no_copy_groups_equal_stacked_tracks():
    # Reference: numpy.stack of the per-track position arrays.
    from msdkit.classify import _stack_positions, _track_arrays

    arr = _track_arrays(_mixed_table(np.random.default_rng()))
    span = np.array([p.shape[0] for p in arr.positions])
    for n in np.unique(span):
        idx = np.flatnonzero(span == n)
        for sub in (idx, idx[1:], idx[::2]):
            got = _stack_positions(arr.positions, arr.xyz, arr.starts, arr.gapped, sub, int(n))
            np.testing.assert_array_equal(got, np.stack([arr.positions[i] for i in sub]))


def test_amplitudes_from_stored_periodograms_equal_those_from_steps():
    # Reference: amplitude_at_alpha computing the periodograms itself from the steps (numpy.fft.rfft).
    from msdkit.motion_models import amplitude_at_alpha

    g = np.random.default_rng()
    steps = np.diff(brownian_positions(12, 50, D_um2_s=0.3, frame_interval_s=DT, exposure_s=DT,
                                       localization_sd_um=0.02, rng=g), axis=1)
    f = fit_step_models(steps, exposure_ratio=1.0)
    a = amplitude_at_alpha(steps, exposure_ratio=1.0, alpha=0.8)
    b = amplitude_at_alpha(None, exposure_ratio=1.0, alpha=0.8, periodogram=f.periodogram, n_steps=49,
                           n_axes=2)
    np.testing.assert_allclose(b, a, rtol=1e-12)
    np.testing.assert_allclose(f.periodogram, periodograms(steps, split_cosine_taper(49)), rtol=1e-12)


def test_sample_motion_reusing_the_fits_equals_the_direct_computation(monkeypatch):
    # Reference: the same function with a fresh fit (no cache) and every run's periodogram recomputed from
    # its steps (numpy.fft.rfft); tracks with missed frames included.
    import msdkit.classify as C

    tracks = _mixed_table(np.random.default_rng())
    cls = classify_tracks(tracks, frame_interval_s=DT, exposure_s=DT)
    kw = dict(frame_interval_s=DT, exposure_s=DT, n_boot=50, rng=4)
    fast = sample_motion(tracks, cls, **kw).to_dict()

    C._FIT_CACHE.clear()
    monkeypatch.setattr(C, "_known_runs", lambda *a: {})
    slow = sample_motion(tracks, cls, **kw).to_dict()
    assert fast["flags"] == slow["flags"]
    for k, v in fast["numbers"].items():
        if v is None or isinstance(v, int):
            assert v == slow["numbers"][k], k
        else:
            assert v == pytest.approx(slow["numbers"][k], rel=1e-10, abs=1e-13), k


def test_pooled_alpha_with_per_unit_sums_equals_run_by_run_sums():
    # Reference: Σ_runs of P_run @ (w / spec)ᵀ run by run (numpy matrix products), against which the pooled
    # likelihood of _pooled_spectrum_alpha (periodograms summed per unit first) is checked through its result:
    # the profile over alpha computed here directly from the run-by-run sums, put through the library's own
    # maximisation (parabolic refinement in the noise ratio, then in alpha), must give the same alpha to
    # rounding. Any seed: the two agree to ~1e-13 (200 seeds measured), while a log-determinant term weighted
    # 0.97 or Q without the frequency weights moves alpha by far more than the 1e-9 allowed.
    from msdkit.classify import _pooled_spectrum_alpha, _refine_max
    from msdkit.motion_models import ALPHA_GRID, NOISE_RATIO_GRID, _bank, _profile_noise

    g = np.random.default_rng()
    pos = fbm_positions(30, 41, alpha=0.7, K_um2_s_alpha=0.2, frame_interval_s=DT, localization_sd_um=0.01,
                        rng=g)
    runs = list(pos)
    owner = np.arange(30)
    a_hat, _, n_runs = _pooled_spectrum_alpha(runs, owner, 0.0, np.random.default_rng(0), 0)
    bank = _bank(40, 0.0)
    spec = bank.fbm[:, None, :] + NOISE_RATIO_GRID[None, :, None] * bank.noise[None, None, :]
    spec = np.maximum(spec, 0.5 * bank.fbm[:, None, :])
    w = bank.weights
    Q = sum(periodograms(np.diff(r, axis=0)[None], bank.taper)[0] @ (w / spec).transpose(0, 2, 1)
            for r in runs)
    W = 30 * w.sum()
    ll = -2 * (30 * (np.log(spec) @ w) + W * (np.log(Q / (2 * W)) + 1.0))  # (A, R)
    half_ok = NOISE_RATIO_GRID[None, :] >= -np.min(0.5 * bank.fbm[:, 1:] / bank.noise[1:], axis=1)[:, None]
    ll = np.where(half_ok, ll, -np.inf)
    prof, _, _ = _profile_noise(ll[None])  # (1, A)
    a_ref = float(_refine_max(prof, ALPHA_GRID)[0])
    assert n_runs == 30
    assert abs(a_hat - a_ref) <= 1e-9
    assert abs(a_hat - ALPHA_GRID[np.argmax(prof[0])]) <= ALPHA_GRID[1] - ALPHA_GRID[0]  # refinement stays local


def test_fit_cache_key_changes_with_the_content_and_not_with_a_copy():
    # Common practice: a cache key must follow the data, not the object.
    from msdkit.classify import _fingerprint

    t = _mixed_table(np.random.default_rng())
    k = _fingerprint(t, 0.03)
    assert _fingerprint(t.copy(), 0.03) == k
    s = t.copy()
    x = s["x_um"].to_numpy().copy()
    x[[3, 4]] = x[[4, 3]]  # two values swapped: same sum
    s["x_um"] = x
    assert _fingerprint(s, 0.03) != k
    s = t.copy()
    s.loc[s.index[0], "y_um"] += 1e-9
    assert _fingerprint(s, 0.03) != k
    assert _fingerprint(t, 0.05) != k


def test_runs_read_from_the_fits_equal_the_runs_of_the_table():
    # Reference: _contiguous_runs on the table (pandas/numpy sort and split at frame jumps); the runs taken
    # from the fits' stored positions must be the same arrays in the same order.
    from msdkit.classify import _contiguous_runs, _fit_all_uncached, _runs_from_fits

    t = _mixed_table(np.random.default_rng())
    fits = _fit_all_uncached(t, DT, DT, 10)
    runs_a, own_a = _contiguous_runs(t, np.sort(fits.ids[fits.usable]))
    runs_b, own_b = _runs_from_fits(fits)
    np.testing.assert_array_equal(own_a, own_b)
    assert len(runs_a) == len(runs_b) > len(np.unique(own_a))  # gapped tracks give several runs
    for a, b in zip(runs_a, runs_b, strict=True):
        np.testing.assert_array_equal(a, b)
