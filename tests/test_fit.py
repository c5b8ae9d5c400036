"""Tests of the estimators of D and alpha against published values and simulations with known truth."""

import numpy as np
import pandas as pd
import pytest

from msdkit.errors import FitError
from msdkit.estimators import anomalous as an
from msdkit.estimators import diffusion as dif
from msdkit.fit import SampleFit, cramer_rao_relative_sd, fit_sample, fit_tracks
from msdkit.simulate import brownian_positions, fbm_positions, positions_to_tracks

DT = 0.01


def brownian_tracks(M, N, *, x, R=0.0, D=1.0, seed=0, **kw):
    pos = brownian_positions(M, N, D_um2_s=D, frame_interval_s=DT, exposure_s=6 * R * DT,
                             localization_sd_um=np.sqrt(x * D * DT), rng=np.random.default_rng(seed), **kw)
    return positions_to_tracks(pos, frame_interval_s=DT)


# ------------------------------------------------------------------ published check values

@pytest.mark.parametrize("x, expected", [(None, 0.101), (0.1, 0.180), (1.0, 0.214), (10.0, 0.327)])
def test_cramer_rao_bound_for_100_points_matches_published_values(x, expected):
    # METHODS.md (exact, computed from the MA(1) Fisher information; Vestergaard et al. 2014): N = 100, 2D
    got = cramer_rao_relative_sd(100, 0.0, sigma_known=True) if x is None else cramer_rao_relative_sd(100, x)
    assert got == pytest.approx(expected, abs=0.0005)


def test_cramer_rao_bound_approaches_the_large_n_formula():
    # SD/D >= sqrt(2 (1 + 2 sqrt(1 + 2 eps)) / (d N_s)), eps = x - 2R (Vestergaard et al. 2014)
    for x, R in ((1.0, 0.0), (10.0, 1 / 6)):
        eps = x - 2 * R
        large_n = np.sqrt(2 * (1 + 2 * np.sqrt(1 + 2 * eps)) / (2 * 19999))
        assert cramer_rao_relative_sd(20000, x, blur_R=R) == pytest.approx(large_n, rel=0.01)


@pytest.mark.parametrize("N_s, n, ratio", [(20, 1, 0.05), (20, 10, 0.47273), (20, 15, None), (50, 3, None)])
def test_msd_variance_matches_qian_sheetz_elson_1991(N_s, n, ratio):
    # Qian et al. 1991, Biophys. J. 60:910, 2D Brownian: K = N_s - n + 1
    K = N_s - n + 1
    formula = ((4 * n * n * K + 2 * K + n - n**3) / (6 * n * K * K) if n <= K
               else 1 + (K**3 - 4 * n * K * K + 4 * n - K) / (6 * n * n * K))
    if ratio is not None:
        assert formula == pytest.approx(ratio, abs=5e-6)
    Qbb, _, _ = dif.msd_covariance_terms(N_s, n)
    assert Qbb[n - 1, n - 1] / (2 * n * n) == pytest.approx(formula, rel=1e-12)


@pytest.mark.parametrize("x, allowed",
                         [(0.1, {2}), (1.0, {3}), (3.0, {4, 5}), (10.0, {7, 8}), (30.0, {11, 12, 13, 14})])
@pytest.mark.parametrize("N", [100, 1000])
def test_optimal_lag_count_matches_michalet_2010(N, x, allowed):
    # Michalet 2010, Phys. Rev. E 82:041914 (as tabulated in METHODS.md), nearly independent of N
    terms = dif.slope_variance_terms(N - 1, 40)
    b, a = 2.0, x
    var = terms[:, 0] * b * b + 2 * terms[:, 1] * a * b + terms[:, 2] * a * a
    assert int(np.nanargmin(var)) in allowed


@pytest.mark.parametrize("x, expected", [(0.1, 0.181), (1.0, 0.221), (10.0, 0.349)])
def test_optimal_lag_fit_precision_matches_published_values(x, expected):
    # METHODS.md: optimal-p fit 18.1 / 22.1 / 34.9 % for N = 100, 2D
    terms = dif.slope_variance_terms(99, 40)
    var = terms[:, 0] * 4 + 2 * terms[:, 1] * 2 * x + terms[:, 2] * x * x
    assert np.sqrt(np.nanmin(var) / 2) / 2 == pytest.approx(expected, abs=0.0006)


def test_blurred_power_law_reduces_to_savin_doyle_for_normal_diffusion():
    # alpha = 1: MSD per axis = 2 D (t - t_E/3) (Savin & Doyle 2005); no exposure: t^alpha
    t = np.array([0.01, 0.02, 0.5, 3.0])
    np.testing.assert_allclose(an.blurred_power_law(t, 1.0, 0.01), t - 0.01 / 3, rtol=1e-9)
    np.testing.assert_allclose(an.blurred_power_law(t, 0.6, 0.0), t**0.6, rtol=1e-12)
    # series and closed form agree where they meet
    for u in (0.0099, 0.0101):
        g = an.blurred_power_law(1.0, 0.5, u)
        ref = ((1 + u) ** 2.5 + (1 - u) ** 2.5 - 2) / (u * u * 1.5 * 2.5) - 2 * u**0.5 / (1.5 * 2.5)
        assert g == pytest.approx(ref, rel=1e-8)


# ------------------------------------------------------------------ simulations with known truth

def test_covariance_estimator_variance_formula_holds_by_monte_carlo():
    # Vestergaard, Blainey & Flyvbjerg 2014: Var(D)/D^2 = [(6 + 4e + 2e^2)/N + 4 (1 + e)^2 / N^2] / d
    M, N, x, R = 6000, 40, 1.0, 1 / 6
    f = fit_tracks(brownian_tracks(M, N, x=x, R=R, seed=1), frame_interval_s=DT, exposure_s=6 * R * DT,
                   method="covariance", fit_alpha=False)
    eps, Ns = x - 2 * R, N - 1
    predicted = ((6 + 4 * eps + 2 * eps**2) / Ns + 4 * (1 + eps) ** 2 / Ns**2) / 2
    # the same formula in (b, a) form, as the library holds it: b = 2 D dt, a = sigma^2 - R b
    kbb, kab, kaa = dif.covariance_variance_coefficients(Ns, n_dims=2)
    b, a = 2 * DT, x * DT - R * 2 * DT
    assert (kbb * b * b + 2 * kab * a * b + kaa * a * a) / b**2 == pytest.approx(predicted, rel=1e-12)
    got = f["D_um2_s"].var(ddof=1)
    # SE of a sample variance: sqrt((kurtosis - 1) / M) relative; these sums have kurtosis < 4
    assert got == pytest.approx(predicted, rel=4 * np.sqrt(3 / M))


@pytest.mark.parametrize("method", ["covariance", "one_step_likelihood", "likelihood", "msd_fit", "auto"])
def test_estimators_are_unbiased_with_motion_blur(method):
    # R = 1/6 (full-frame exposure), x = 1: mean of per-track D within 4 standard errors of the truth
    M, N = 3000, 50
    f = fit_tracks(brownian_tracks(M, N, x=1.0, R=1 / 6, seed=2), frame_interval_s=DT, exposure_s=DT,
                   method=method, fit_alpha=False)
    D = f["D_um2_s"].to_numpy()
    assert abs(D.mean() - 1.0) < 4 * D.std(ddof=1) / np.sqrt(M)


def test_auto_reaches_the_cramer_rao_bound_and_picks_by_noise_level():
    for x, expect in ((0.1, "covariance"), (10.0, "one_step_likelihood")):
        M, N = 3000, 100
        f = fit_tracks(brownian_tracks(M, N, x=x, seed=3), frame_interval_s=DT, exposure_s=0.0,
                       fit_alpha=False)
        assert (f["method"] == expect).all()
        rel_sd = f["D_um2_s"].std(ddof=1)
        crb = cramer_rao_relative_sd(N, x)
        # sample SD has relative SE ~ 1/sqrt(2M); allow the 1.1 x target plus 4 SE
        assert rel_sd < crb * (1.1 + 4 / np.sqrt(2 * M))


@pytest.mark.parametrize("method", ["auto", "covariance", "one_step_likelihood", "likelihood", "msd_fit"])
def test_per_track_intervals_cover_the_truth_95_percent_of_the_time(method):
    M, N, x = 2000, 60, 1.0
    f = fit_tracks(brownian_tracks(M, N, x=x, seed=4), frame_interval_s=DT, exposure_s=0.0, method=method,
                   fit_alpha=False)
    cover = np.mean((f["D_ci95_lo_um2_s"] <= 1.0) & (f["D_ci95_hi_um2_s"] >= 1.0))
    assert abs(cover - 0.95) < 4 * np.sqrt(0.95 * 0.05 / M)  # binomial tolerance


def test_gaps_are_not_taken_for_one_frame_steps():
    M, N = 2000, 60
    t = brownian_tracks(M, N, x=0.5, seed=5)
    rng = np.random.default_rng(6)
    gappy = t[rng.random(len(t)) > 0.2]  # 20 % of frames missed
    for method in ("covariance", "one_step_likelihood", "msd_fit"):
        f = fit_tracks(gappy, frame_interval_s=DT, exposure_s=0.0, method=method, fit_alpha=False)
        D = f.loc[f["fit_status"] == "ok", "D_um2_s"].to_numpy()
        # a naive estimator treating two-frame steps as one would read about 1.2 x too high
        assert abs(D.mean() - 1.0) < 4 * D.std(ddof=1) / np.sqrt(D.size), method
    s = fit_sample(gappy, frame_interval_s=DT, exposure_s=0.0, n_boot=200)
    assert s.D_ci95_um2_s[0] <= 1.0 <= s.D_ci95_um2_s[1]


def test_single_track_estimates_can_be_negative_and_are_not_clipped():
    f = fit_tracks(brownian_tracks(3000, 20, x=10.0, seed=7), frame_interval_s=DT, exposure_s=0.0,
                   method="covariance", fit_alpha=False)
    D = f["D_um2_s"].to_numpy()
    assert (D < 0).any()
    assert abs(D.mean() - 1.0) < 4 * D.std(ddof=1) / np.sqrt(D.size)


def test_too_short_tracks_are_flagged_and_others_fitted():
    t = brownian_tracks(5, 30, x=0.1, seed=8)
    short = pd.DataFrame({"track": [99, 99], "frame": [0, 1], "x_um": [0.0, 0.1], "y_um": [0.0, 0.0],
                          "time_s": [0.0, DT]})
    f = fit_tracks(pd.concat([t, short]), frame_interval_s=DT, exposure_s=0.0)
    assert f.set_index("track").loc[99, "fit_status"] == "too_short"
    assert np.isnan(f.set_index("track").loc[99, "D_um2_s"])
    assert (f.loc[f["track"] != 99, "fit_status"] == "ok").all()


def test_fit_sample_pools_steps_and_its_bootstrap_is_reproducible():
    t = brownian_tracks(300, 50, x=1.0, R=1 / 6, seed=9)
    a = fit_sample(t, frame_interval_s=DT, exposure_s=DT, n_boot=300, rng=5)
    b = fit_sample(t, frame_interval_s=DT, exposure_s=DT, n_boot=300, rng=5)
    assert isinstance(a, SampleFit) and a == b
    assert a.n_tracks == 300 and a.n_steps == 300 * 49
    # pooled D of 14700 steps: SD about 21 % / sqrt(300)
    assert abs(a.D_um2_s - 1.0) < 4 * 0.3 / np.sqrt(300)
    assert a.D_ci95_um2_s[0] < a.D_um2_s < a.D_ci95_um2_s[1]
    assert a.sigma_um == pytest.approx(0.1, rel=0.1)
    assert a.alpha_ci95[0] <= 1.0 <= a.alpha_ci95[1]


def test_sample_alpha_is_not_pulled_below_one_by_localisation_noise():
    # x = 3: a plain log-log fit over lags 1-10 would read alpha ~ 0.8 (METHODS.md: n/(n + x))
    t = brownian_tracks(200, 100, x=3.0, R=1 / 6, seed=10)
    s = fit_sample(t, frame_interval_s=DT, exposure_s=DT, n_boot=300)
    assert s.alpha_ci95[0] <= 1.0 <= s.alpha_ci95[1]
    assert abs(s.alpha - 1.0) < 4 * s.alpha_se


def test_sample_alpha_of_fractional_brownian_motion_is_recovered():
    pos = fbm_positions(200, 100, alpha=0.5, K_um2_s_alpha=0.2, frame_interval_s=DT, localization_sd_um=0.02,
                        rng=np.random.default_rng(11))
    s = fit_sample(positions_to_tracks(pos, frame_interval_s=DT), frame_interval_s=DT, exposure_s=0.0,
                   n_boot=300)
    assert abs(s.alpha - 0.5) < 4 * s.alpha_se
    assert s.alpha_ci95[1] < 1.0


def test_per_track_alpha_uses_the_shared_localisation_error():
    pos = fbm_positions(400, 150, alpha=0.7, K_um2_s_alpha=0.5, frame_interval_s=DT, localization_sd_um=0.05,
                        rng=np.random.default_rng(12))
    t = positions_to_tracks(pos, frame_interval_s=DT)
    f = fit_tracks(t, frame_interval_s=DT, exposure_s=0.0)
    a = f["alpha"].to_numpy()
    assert abs(np.median(a) - 0.7) < 0.05
    cover = np.mean((f["alpha_ci95_lo"] <= 0.7) & (f["alpha_ci95_hi"] >= 0.7))
    assert cover > 0.85


@pytest.mark.slow
def test_sample_alpha_interval_contains_one_for_brownian_samples_95_percent_of_the_time():
    hits = []
    for seed in range(200):
        x = (0.1, 1.0, 3.0)[seed % 3]
        t = brownian_tracks(50, 100, x=x, R=1 / 6, seed=1000 + seed)
        s = fit_sample(t, frame_interval_s=DT, exposure_s=DT, n_boot=400, rng=seed)
        hits.append(s.alpha_ci95[0] <= 1.0 <= s.alpha_ci95[1])
    assert abs(np.mean(hits) - 0.95) < 4 * np.sqrt(0.95 * 0.05 / len(hits))


@pytest.mark.slow
def test_sample_D_interval_covers_the_truth_95_percent_of_the_time():
    hits = []
    for seed in range(300):
        t = brownian_tracks(40, 30, x=(0.1, 3.0)[seed % 2], seed=2000 + seed)
        s = fit_sample(t, frame_interval_s=DT, exposure_s=0.0, n_boot=400, rng=seed)
        hits.append(s.D_ci95_um2_s[0] <= 1.0 <= s.D_ci95_um2_s[1])
    assert abs(np.mean(hits) - 0.95) < 4 * np.sqrt(0.95 * 0.05 / len(hits))


# ------------------------------------------------------------------ bad input

def test_unknown_method_is_rejected_with_the_choices():
    t = brownian_tracks(3, 20, x=0.1)
    with pytest.raises(ValueError, match="method must be 'auto' or 'covariance'"):
        fit_tracks(t, frame_interval_s=DT, exposure_s=0.0, method="fast")


def test_exposure_longer_than_frame_interval_is_rejected():
    t = brownian_tracks(3, 20, x=0.1)
    with pytest.raises(ValueError, match="exposure_s must be between 0 and frame_interval_s"):
        fit_tracks(t, frame_interval_s=DT, exposure_s=2 * DT)


def test_sample_without_usable_steps_raises_fit_error():
    t = pd.DataFrame({"track": [1, 1, 2, 2], "frame": [0, 2, 0, 3], "x_um": [0.0, 1, 0, 1],
                      "y_um": [0.0, 0, 0, 0]})
    with pytest.raises(FitError, match="two steps between consecutive frames"):
        fit_sample(t, frame_interval_s=DT, exposure_s=0.0)


def test_empty_table_gives_empty_fits_with_all_columns():
    t = brownian_tracks(2, 10, x=0.1).iloc[:0]
    f = fit_tracks(t, frame_interval_s=DT, exposure_s=0.0)
    assert len(f) == 0 and "D_ci95_hi_um2_s" in f.columns and "alpha" in f.columns


def test_sample_alpha_is_not_fitted_from_too_few_lags():
    # 4-point tracks span 3 lags: too few for K, alpha and the localisation offset
    s = fit_sample(brownian_tracks(30, 4, x=0.1, seed=13), frame_interval_s=DT, exposure_s=0.0, n_boot=50)
    assert np.isnan(s.alpha) and s.fit_status == "alpha_not_fitted"
    assert np.isfinite(s.D_um2_s) and s.D_ci95_um2_s[0] < s.D_ci95_um2_s[1]


def test_intervals_keep_their_coverage_when_tracks_differ_in_localisation_error():
    # half the tracks bright (x = 0.04), half dim (x = 4): a pooled sigma alone would miscover both halves
    M, N = 1500, 60
    pos = np.concatenate([
        brownian_positions(M, N, D_um2_s=1.0, frame_interval_s=DT, exposure_s=DT, localization_sd_um=s,
                           rng=np.random.default_rng(20 + k)) for k, s in enumerate((0.02, 0.2))])
    f = fit_tracks(positions_to_tracks(pos, frame_interval_s=DT), frame_interval_s=DT, exposure_s=DT,
                   fit_alpha=False)
    cover = ((f["D_ci95_lo_um2_s"] <= 1.0) & (f["D_ci95_hi_um2_s"] >= 1.0)).to_numpy()
    tol = 4 * np.sqrt(0.95 * 0.05 / M)
    assert abs(cover[:M].mean() - 0.95) < tol and abs(cover[M:].mean() - 0.95) < tol


def test_sample_localisation_error_holds_for_subdiffusion_and_keeps_track_alpha_unbiased():
    # fractional Brownian motion, alpha = 0.5: its anticorrelated steps inflate the Brownian-model sigma
    pos = fbm_positions(300, 150, alpha=0.5, K_um2_s_alpha=0.3, frame_interval_s=0.02,
                        localization_sd_um=0.05, rng=np.random.default_rng(14))
    t = positions_to_tracks(pos, frame_interval_s=0.02)
    s = fit_sample(t, frame_interval_s=0.02, exposure_s=0.0, n_boot=200)
    assert s.D_sigma_um > 2 * 0.05  # the D estimator's sigma is not a localisation error here
    assert abs(s.sigma_um - 0.05) < 0.03
    f = fit_tracks(t, frame_interval_s=0.02, exposure_s=0.0, sigma_um=s.sigma_um)
    assert abs(f["alpha"].median() - 0.5) < 0.06


# ------------------------------------------------------ step-model likelihood: fast paths against references

def _full_grid_reference(P, w, shapes, noise, n_axes, drop_zero=False):
    """The profile Whittle log-likelihood of every track on the whole (shape, noise ratio) grid, written out
    from its definition (Sykulski et al. 2019): ll = -n_axes (sum_f w_f log S_f + W log(scale) + W) with the
    closed-form scale = sum_f w_f P_f / S_f / (n_axes W), S = shape + r noise, and the same validity rule."""
    from msdkit.motion_models import NOISE_RATIO_GRID

    W = w.sum()
    wq = w.copy()
    if drop_zero:
        wq[0] = 0.0
    T, S, R = P.shape[0], shapes.shape[0], NOISE_RATIO_GRID.size
    ll = np.full((T, S, R), -np.inf)
    scale = np.zeros((T, S, R))
    for s in range(S):
        for r, ratio in enumerate(NOISE_RATIO_GRID):
            spec = shapes[s] + ratio * noise
            sc = np.maximum(P @ (wq / spec) / (n_axes * W), 1e-300)
            scale[:, s, r] = sc
            if np.all(spec >= 0.5 * shapes[s]):
                ll[:, s, r] = -n_axes * (np.log(spec) @ w + W * np.log(sc) + W)
    return ll, scale


def test_chunked_likelihood_grid_equals_the_full_grid_reference():
    from msdkit import motion_models as mm

    rng = np.random.default_rng(3)
    steps = rng.normal(size=(700, 40, 2)) * 0.1 + rng.normal(size=(700, 1, 2)) * 0.05
    bank = mm._bank(40, 0.4)
    P = mm.periodograms(steps, bank.taper)
    for shapes in (bank.fbm, bank.conf, bank.fbm[18:19]):
        for drop_zero in (False, True):
            ll, sc = _full_grid_reference(P, bank.weights, shapes, bank.noise, 2, drop_zero)
            best, ratio, idx, scale = mm._profile_grid(P, bank.weights, shapes, bank.noise, 2, drop_zero)
            ref_best, ref_ratio, ref_idx = mm._profile_noise(ll)
            np.testing.assert_array_equal(idx, ref_idx)
            np.testing.assert_allclose(best, ref_best, rtol=1e-12)
            # the refined ratio is a parabola's vertex through three nearly equal values: looser
            np.testing.assert_allclose(ratio, ref_ratio, rtol=1e-6, atol=1e-12)
            ref_scale = np.take_along_axis(sc, ref_idx[..., None], -1)[..., 0]
            np.testing.assert_allclose(scale, ref_scale, rtol=1e-12)


def test_periodograms_with_a_free_mean_equal_those_of_the_centred_steps():
    # Reference: msdkit.motion_models.periodograms of the steps minus their mean, transformed separately.
    from msdkit import motion_models as mm

    rng = np.random.default_rng(4)
    steps = rng.normal(size=(300, 57, 2)) + 3.0  # a large common mean (directed motion)
    taper = mm.split_cosine_taper(57)
    P, Pd = mm._periodograms_with_free_mean(steps, taper)
    np.testing.assert_allclose(P, mm.periodograms(steps, taper), rtol=1e-13)
    ref = mm.periodograms(steps - steps.mean(axis=1, keepdims=True), taper)
    np.testing.assert_allclose(Pd, ref, rtol=1e-9, atol=1e-12 * ref.max())


def test_shared_intermediates_give_the_same_fits_as_separate_calls():
    # Reference: fit_tracks and fit_sample called on their own (each collects its steps and TA-MSDs).
    from msdkit.fit import _Shared

    rng = np.random.default_rng(6)
    pos = brownian_positions(60, 90, D_um2_s=1.0, frame_interval_s=DT, exposure_s=DT / 2,
                             localization_sd_um=0.02, rng=rng)
    tr = positions_to_tracks(pos, frame_interval_s=DT, lengths=rng.integers(6, 91, 60))
    tr = tr.drop(index=rng.choice(len(tr), 100, replace=False)).reset_index(drop=True)  # gaps
    kw = dict(frame_interval_s=DT, exposure_s=DT / 2)
    for method in ("auto", "msd_fit", "one_step_likelihood"):
        ref_fits = fit_tracks(tr, method=method, **kw)
        ref_sample = fit_sample(tr, ref_fits, method=method, n_boot=50, **kw)
        shared = _Shared(tr, 2)
        fits = fit_tracks(tr, method=method, _shared=shared, **kw)
        sample = fit_sample(tr, fits, method=method, n_boot=50, _shared=shared, **kw)
        pd.testing.assert_frame_equal(fits, ref_fits)
        assert sample == ref_sample or all(
            np.array_equal(np.asarray(a, float), np.asarray(b, float), equal_nan=True)
            for a, b in zip(sample.__dict__.values(), ref_sample.__dict__.values(), strict=True)
            if not isinstance(a, str)
        )


def test_equal_length_modes_are_read_without_padding_as_the_padded_gather_reads_them():
    # Reference: the padded gather written out (index arithmetic and numpy.where).
    from msdkit.fit import _fill_padded

    rng = np.random.default_rng(7)
    n_modes = np.array([5, 5, 5, 5, 3])
    first = np.concatenate([[0], np.cumsum(n_modes)[:-1]])
    lam, power = rng.normal(size=n_modes.sum()), rng.normal(size=n_modes.sum())
    idx = np.array([1, 2, 3])
    w, (L, S) = _fill_padded(idx, 5, first, n_modes, lam, power)
    src = first[idx][:, None] + np.arange(5)[None, :]
    np.testing.assert_array_equal(w, np.ones((3, 5)))
    np.testing.assert_array_equal(L, lam[src])
    np.testing.assert_array_equal(S, power[src])
