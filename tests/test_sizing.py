"""Size distributions: fake polydispersity, the lag-1 kernel, weightings and deconvolution on known truth."""

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import special, stats

from msdkit import _size_fit, hydro, sizing
from msdkit.simulate import brownian_positions, positions_to_tracks

DT, EXPOSURE, SIGMA, T_C = 1 / 30, 0.015, 0.025, 25.0  # 30 fps, 15 ms exposure, 25 nm localisation error
ETA = hydro.water_viscosity_mpa_s(T_C)
KW = dict(temperature_c=T_C, viscosity_mpa_s=ETA, frame_interval_s=DT, exposure_s=EXPOSURE)


def D_of(diameter_nm):
    return hydro.stokes_einstein_D_um2_s(
        np.asarray(diameter_nm, float) / 2, temperature_c=T_C, viscosity_mpa_s=ETA
    )


def simulate(diameters_nm, *, rng, steps=(5, 30), exposure_s=EXPOSURE, sigma_um=SIGMA, D_scale=1.0):
    g = np.random.default_rng(rng)
    n = len(diameters_nm)
    n_steps = g.integers(steps[0], steps[1] + 1, n)
    pos = brownian_positions(
        n,
        steps[1] + 1,
        D_um2_s=D_of(diameters_nm) * D_scale,
        frame_interval_s=DT,
        exposure_s=exposure_s,
        localization_sd_um=sigma_um,
        rng=g,
    )
    return positions_to_tracks(pos, frame_interval_s=DT, lengths=n_steps + 1)


def test_fake_polydispersity_check_values_for_10_steps():
    # METHODS.md (computed): N_s = 10 → apparent d10/d50/d90 = 0.704/1.034/1.607 × true
    assert sizing.apparent_size_quantiles(10) == pytest.approx([0.704, 1.034, 1.607], abs=5e-4)


@pytest.mark.parametrize("seed", [0, 1])
def test_naive_per_track_sizes_of_identical_particles_spread_as_the_gamma_law_predicts(seed):
    # Saxton 1997: D̂ ~ Gamma(N_s, D/N_s) in 2D; the fraction below each predicted quantile is binomial.
    n = 3000
    tracks = simulate(np.full(n, 100.0), rng=seed, steps=(10, 10), exposure_s=0.0, sigma_um=0.0)
    est = sizing.lag1_track_estimates(tracks, frame_interval_s=DT, exposure_s=0.0, localization_sd_um=0.0)
    naive = hydro.stokes_einstein_diameter_nm(
        est["D_um2_s"].to_numpy(), temperature_c=T_C, viscosity_mpa_s=ETA
    )
    for q, ratio in zip((0.1, 0.5, 0.9), sizing.apparent_size_quantiles(10), strict=True):
        frac = np.mean(naive < 100.0 * ratio)
        assert abs(frac - q) < 4 * math.sqrt(q * (1 - q) / n)


@pytest.mark.parametrize("seed", [3, 4])
def test_lag1_estimator_is_unbiased_with_blur_and_localisation_noise(seed):
    # E⟨Δx²⟩ = 2DΔt(1 − 2R) + 2σ² (Berglund 2010); SE from the kernel's variance.
    tracks = simulate(np.full(2000, 100.0), rng=seed, steps=(12, 12))
    est = sizing.lag1_track_estimates(
        tracks, frame_interval_s=DT, exposure_s=EXPOSURE, localization_sd_um=SIGMA
    )
    D0 = float(D_of(100.0))
    se = D0 * math.sqrt(1.02 / 12 / len(est))
    assert abs(est["D_um2_s"].mean() - D0) < 4.5 * se
    assert est.attrs["sigma_source"] == "given"


def test_kernel_variance_matches_the_spread_of_simulated_lag1_statistics():
    # MA(1) increments (Berglund 2010): Var m = 2(N a² + 2(N−1) b²)/(d N²); kurtosis 6/k sets the tolerance.
    n_tr, n_s = 6000, 8
    tracks = simulate(np.full(n_tr, 100.0), rng=7, steps=(n_s, n_s), sigma_um=0.06)
    est = sizing.lag1_track_estimates(
        tracks, frame_interval_s=DT, exposure_s=EXPOSURE, localization_sd_um=0.06
    )
    R = sizing.blur_coefficient(DT, EXPOSURE)
    tr, kernel, _ = sizing._tracks_from_fits(est, DT, R, 2, None, "track")
    assert kernel.startswith("lag1 gamma (exact")
    k, theta = sizing._gamma_shape_scale(np.array([[float(D_of(100.0))]]), tr, DT, R, 2)
    pred_mean, pred_var = float(k[0, 0] * theta[0, 0]), float(k[0, 0] * theta[0, 0] ** 2)
    y = est["mean_sq_step_um2"].to_numpy()
    assert abs(y.mean() - pred_mean) < 4 * math.sqrt(pred_var / n_tr)
    rel_se = math.sqrt((2 + 6 / k[0, 0]) / n_tr)
    assert abs(y.var() / pred_var - 1) < 4 * rel_se


def test_pooled_localisation_error_is_recovered_when_not_given():
    # Vestergaard 2014: σ̂² = R⟨Δx²⟩ + (2R − 1)⟨Δx_k Δx_k+1⟩ is unbiased; SE from the scatter of 20 groups.
    sigma = 0.04
    tracks = simulate(np.full(4000, 400.0), rng=11, steps=(40, 40), sigma_um=sigma)
    groups = []
    for g in range(20):
        part = tracks[tracks["track"] % 20 == g]
        est = sizing.lag1_track_estimates(part, frame_interval_s=DT, exposure_s=EXPOSURE)
        assert est.attrs["sigma_source"] == "pooled"
        groups.append(est["sigma_um"].iloc[0] ** 2)
    groups = np.array(groups)
    assert abs(groups.mean() - sigma**2) < 5 * groups.std(ddof=1) / math.sqrt(groups.size)


def test_hatch_choate_conversions_of_a_lognormal_number_distribution():
    # Hatch & Choate 1929 (METHODS.md, computed): CMD 100 nm, σ_g 1.2 → number 79.16/100.00/126.32,
    # volume 87.46/110.49/139.57, span 0.4716; intensity (d⁶) median 100 exp(6 ln² 1.2) = 122.08.
    d = np.exp(np.linspace(np.log(30), np.log(400), 4000))
    number = stats.norm.pdf(np.log(d), np.log(100.0), np.log(1.2))
    n = sizing.size_statistics(d, number)
    v = sizing.size_statistics(d, sizing.weighted_fractions(d, number, 3))
    i = sizing.size_statistics(d, sizing.weighted_fractions(d, number, 6))
    assert (n.d10_nm, n.d50_nm, n.d90_nm) == pytest.approx((79.16, 100.00, 126.32), abs=0.02)
    assert (v.d10_nm, v.d50_nm, v.d90_nm) == pytest.approx((87.46, 110.49, 139.57), abs=0.02)
    assert i.d50_nm == pytest.approx(100 * math.exp(6 * math.log(1.2) ** 2), abs=0.02)
    for s in (n, v, i):
        assert s.span == pytest.approx(0.4716, abs=2e-4)
    # modes are read on the ln d axis, where a log-normal peaks at its median (Hatch & Choate 1929)
    assert n.modes_nm == pytest.approx((100.0,), rel=2e-3)


@pytest.mark.parametrize("seed", [0, 1])
def test_deconvolution_recovers_a_monodisperse_size_from_short_tracks(seed):
    # Known truth (100 nm, 5–30 steps, blur and noise): the raw histogram is wide, the deconvolved one narrow.
    tracks = simulate(np.full(600, 100.0), rng=seed)
    est = sizing.lag1_track_estimates(
        tracks, frame_interval_s=DT, exposure_s=EXPOSURE, localization_sd_um=SIGMA
    )
    dist = sizing.size_distribution(est, **KW)
    assert dist.status == "ok"
    # D50 SE ≈ 1/√(Σ N_s) ≈ 1.0 %; 3 % is ≥ 3 SE
    assert dist.d50_nm == pytest.approx(100.0, rel=0.03)
    assert dist.sample_diameter_nm == pytest.approx(100.0, rel=0.03)
    assert dist.raw.span > 0.4
    # A log-normal width s cannot be told from 0 below SD(ŝ²) ≈ √2 / √(Σ_i N_i²) ≈ 0.003 here (Fisher
    # information of a variance component); span 0.3 is ŝ ≈ 0.12, ŝ² ≈ 4.5 SD.
    assert dist.span < 0.3
    assert len(dist.modes_nm) == 1


def test_deconvolution_separates_an_80_plus_250_nm_mixture():
    g = np.random.default_rng(21)
    truth = np.where(g.random(600) < 0.5, 80.0, 250.0)
    tracks = simulate(truth, rng=22)
    est = sizing.lag1_track_estimates(
        tracks, frame_interval_s=DT, exposure_s=EXPOSURE, localization_sd_um=SIGMA
    )
    dist = sizing.size_distribution(est, **KW)
    assert len(dist.modes_nm) == 2
    assert dist.modes_nm[0] == pytest.approx(80.0, rel=0.1)
    assert dist.modes_nm[1] == pytest.approx(250.0, rel=0.1)
    # binomial SD of the true fraction is 0.02; allow 0.1 as in the benchmark target
    assert dist.number.mode_fractions[0] == pytest.approx(np.mean(truth == 80.0), abs=0.1)


def test_sample_size_averages_D_while_a_mean_of_track_sizes_is_biased_high():
    # single-track d̂ is biased high by d N_s/(d N_s − 2) (METHODS.md); pooled D is not.
    tracks = simulate(np.full(1500, 100.0), rng=5, steps=(5, 8))
    est = sizing.lag1_track_estimates(
        tracks, frame_interval_s=DT, exposure_s=EXPOSURE, localization_sd_um=SIGMA
    )
    sizes = sizing.track_sizes_nm(est, **KW)
    naive_mean = np.nanmean(sizes["naive_diameter_nm"])
    corrected_mean = np.nanmean(sizes["diameter_nm"])
    n_mean = est["n_steps"].mean()
    assert naive_mean > 100.0 * (1 + 0.5 / n_mean)  # bias ≈ 1/(N_s − 1) ≈ 17 %
    se = np.nanstd(sizes["diameter_nm"]) / math.sqrt(len(sizes))
    assert abs(corrected_mean - 100.0) < 4 * se + 1.0  # +1 nm: Gamma approximation of the offset-shifted law
    dist = sizing.size_distribution(est, **KW)
    se_d = 100.0 / math.sqrt(est["n_steps"].sum())
    assert abs(dist.sample_diameter_nm - 100.0) < 4 * se_d


def test_expected_inverse_of_a_gamma_estimate_gives_the_short_track_bias_factor():
    # E[1/D̂] = k/((k − 1) D) for D̂ ~ Gamma(k, D/k) (standard χ² algebra)
    k = 10.0
    x = np.linspace(1e-4, 10, 200001)
    mean_inv = np.trapezoid(stats.gamma.pdf(x, a=k, scale=1 / k) / x, x)
    assert mean_inv == pytest.approx(k / (k - 1), rel=1e-6)
    assert special.polygamma(1, k) == pytest.approx(1 / k + 1 / (2 * k**2), rel=0.01)


def test_wall_distance_enters_the_size_grid_through_faxen():
    # Faxén (h/r = 2 → 0.7214): particles 0.1 µm from the wall diffuse 28 % slower but are sized right.
    d_true, h_um = 100.0, 0.1
    tracks = simulate(np.full(400, d_true), rng=9, D_scale=float(hydro.faxen_parallel_factor(2.0)))
    est = sizing.lag1_track_estimates(
        tracks, frame_interval_s=DT, exposure_s=EXPOSURE, localization_sd_um=SIGMA
    )
    plain = sizing.size_distribution(est, **KW)
    walled = sizing.size_distribution(est, wall_distance_um=h_um, **KW)
    assert plain.d50_nm > 120.0
    assert walled.d50_nm == pytest.approx(d_true, rel=0.04)
    assert walled.sample_diameter_nm == pytest.approx(d_true, rel=0.04)


def test_size_table_and_summary_follow_the_output_contract():
    tracks = simulate(np.full(80, 100.0), rng=2)
    est = sizing.lag1_track_estimates(tracks, frame_interval_s=DT, exposure_s=EXPOSURE)
    dist = sizing.size_distribution(est, **KW)
    assert tuple(dist.table.columns) == sizing.SIZE_TABLE_COLUMNS
    for col in ("raw_number_fraction", "number_fraction", "volume_fraction", "intensity_fraction"):
        assert dist.table[col].sum() == pytest.approx(1.0)
    summary = json.loads(json.dumps(dist.to_dict()))
    assert set(summary) >= {"sample_diameter_nm", "number", "volume", "intensity", "raw_per_track", "method"}
    assert summary["number"]["d50_nm"] == pytest.approx(dist.d50_nm)
    assert dist.volume.d50_nm >= dist.number.d50_nm


def test_fewer_than_50_tracks_fall_back_to_the_best_lognormal():
    tracks = simulate(np.full(30, 100.0), rng=4)
    est = sizing.lag1_track_estimates(tracks, frame_interval_s=DT, exposure_s=EXPOSURE)
    dist = sizing.size_distribution(est, **KW)
    assert dist.status == "ok"
    assert "log-normal" in dist.method["regularization_rule"]


def test_two_tracks_are_too_few_and_say_so():
    tracks = simulate(np.full(2, 100.0), rng=4)
    est = sizing.lag1_track_estimates(tracks, frame_interval_s=DT, exposure_s=EXPOSURE)
    dist = sizing.size_distribution(est, **KW)
    assert dist.status == "too_few_tracks"
    assert math.isnan(dist.d50_nm)
    assert json.dumps(dist.to_dict())


def test_gaps_split_steps_and_are_not_counted_as_lag_one():
    tracks = pd.DataFrame(
        {"track": [0] * 5, "frame": [0, 1, 2, 4, 5], "x_um": [0.0, 1, 2, 3, 4], "y_um": [0.0] * 5}
    )
    est = sizing.lag1_track_estimates(tracks, frame_interval_s=1.0, exposure_s=0.0, localization_sd_um=0.0)
    assert int(est["n_steps"].iloc[0]) == 3
    assert int(est["n_adjacent_steps"].iloc[0]) == 1
    assert est["mean_sq_step_um2"].iloc[0] == pytest.approx(3 / 6)


@pytest.mark.parametrize(
    ("table", "match"),
    [
        (pd.DataFrame({"track": [0], "n_points": [5]}), "D_um2_s"),
        (pd.DataFrame({"track": [0], "D_um2_s": [1.0]}), "n_steps or n_points"),
    ],
)
def test_size_distribution_rejects_tables_without_the_needed_columns(table, match):
    with pytest.raises(ValueError, match=match):
        sizing.size_distribution(table, **KW)


def test_lag1_estimates_reject_tracks_without_positions_in_um():
    with pytest.raises(ValueError, match="columns track, frame, x_um, y_um"):
        sizing.lag1_track_estimates(
            pd.DataFrame({"track": [0], "frame": [0], "x_px": [1.0]}), frame_interval_s=DT, exposure_s=0.0
        )


# ----------------------------------------------------------------------------------------------------------
# Tracks from a linker: lost long steps and wrong joins
# ----------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize(("a", "lam", "max_step"), [(0.35, 0.15, 1.757), (0.12, 0.3, 1.0), (2.0, 0.1, 0.5)])
def test_step_moments_under_linking_loss_match_a_truncated_exponential(a, lam, max_step):
    # 2-D squared step length s of per-axis variance a is exponential with mean 2a (χ² with 2 degrees of
    # freedom); tilted by exp(−λ s) and cut at s < M it is a truncated exponential: reference values from
    # scipy.stats.truncexpon (general-purpose reference library).
    mu = 1.0 / (1.0 / (2 * a) + lam)
    ref = stats.truncexpon(b=max_step**2 / mu, scale=mu)
    mean, var = _size_fit._step_moments(np.array(a), 2, _size_fit.StepLimits(max_step, lam))
    assert float(mean) == pytest.approx(ref.mean() / 2, rel=1e-9)
    assert float(var) == pytest.approx(ref.var() / 4, rel=1e-7)
    # no limits: per-axis mean square of one 2-D Gaussian step is Gamma(1, a) (χ² algebra)
    mean0, var0 = _size_fit._step_moments(np.array(a), 2, _size_fit.NO_LIMITS)
    assert (float(mean0), float(var0)) == pytest.approx((a, a * a))


def _thin_like_a_linker(tracks, *, lam, max_step_um, rng):
    """Drop each step with probability 1 − exp(−λ r²) (and every step longer than max_step_um); a dropped step
    ends the track there and the particle goes on as a new track."""
    g = np.random.default_rng(rng)
    t = tracks.sort_values(["track", "frame"]).reset_index(drop=True)
    same = np.r_[False, t["track"].to_numpy()[1:] == t["track"].to_numpy()[:-1]]
    r2 = np.r_[0.0, np.diff(t["x_um"]) ** 2 + np.diff(t["y_um"]) ** 2]
    kept = (g.random(len(t)) < np.exp(-lam * r2)) & (r2 < max_step_um**2)
    t["track"] = np.cumsum(~(same & kept))
    return t


def test_kernel_with_the_linking_step_loss_sizes_beads_whose_long_steps_were_lost():
    # Truth: 100 nm (Stokes–Einstein, water 25 °C); steps kept with probability exp(−λ r²) for r < R. Expected
    # bias without the loss in the kernel: E s from 2a = 0.558 to 0.458 µm² (−18 % in D, +22 % in size).
    tracks = _thin_like_a_linker(
        simulate(np.full(300, 100.0), rng=34, steps=(20, 40)), lam=0.3, max_step_um=1.5, rng=35
    )
    est = sizing.lag1_track_estimates(
        tracks, frame_interval_s=DT, exposure_s=EXPOSURE, localization_sd_um=SIGMA
    )
    plain = sizing.size_distribution(est, **KW)
    aware = sizing.size_distribution(est, max_step_um=1.5, step_loss_per_um2=0.3, **KW)
    assert plain.d50_nm > 110.0
    # D50 SE ≈ 1/√(Σ N_s) ≈ 0.8 %
    assert aware.d50_nm == pytest.approx(100.0, rel=0.03)


@pytest.mark.slow
def test_kernel_with_the_linking_step_loss_sizes_a_mixture_whose_long_steps_were_lost():
    # Truth: 80 + 250 nm (Stokes–Einstein, water 25 °C). Steps kept with probability exp(−λ r²) for r < R
    # (nearest-competitor law of a Poisson process of spots). Without the loss in the kernel fast particles
    # read slow: E s falls from 2a to about 1/(1/(2a) + λ) (−24 % at 80 nm here); with it both modes are
    # right.
    g = np.random.default_rng(31)
    truth = np.where(g.random(700) < 0.5, 80.0, 250.0)
    tracks = _thin_like_a_linker(simulate(truth, rng=32, steps=(20, 40)), lam=0.3, max_step_um=1.5, rng=33)
    est = sizing.lag1_track_estimates(
        tracks, frame_interval_s=DT, exposure_s=EXPOSURE, localization_sd_um=SIGMA
    )
    plain = sizing.size_distribution(est, **KW)
    aware = sizing.size_distribution(est, max_step_um=1.5, step_loss_per_um2=0.3, **KW)
    assert min(plain.modes_nm) > 92.0  # ~ +30 % expected
    assert len(aware.modes_nm) == 2
    assert aware.modes_nm[0] == pytest.approx(80.0, rel=0.1)
    assert aware.modes_nm[1] == pytest.approx(250.0, rel=0.1)


def _joined_tracks(diameters_nm, *, rng, pieces=(2, 3), steps=(8, 25)):
    """Tracks that a linker built from several particles: pieces of different particles joined end to end,
    the join a step of the new particle (a wrong join). Returns tracks and the true diameter per position."""
    g = np.random.default_rng(rng)
    n_pieces = int(len(diameters_nm))
    raw = simulate(diameters_nm, rng=g, steps=steps)
    raw = raw.sort_values(["track", "frame"]).reset_index(drop=True)
    d_of_piece = np.asarray(diameters_nm, float)
    owner = np.zeros(n_pieces, dtype=int)
    k, j = 0, 0
    while j < n_pieces:
        m = int(g.integers(pieces[0], pieces[1] + 1))
        owner[j : j + m] = k
        j, k = j + m, k + 1
    rows = []
    for t in range(k):
        xs, ys, ds = [], [], []
        for p in np.flatnonzero(owner == t):
            piece = raw[raw["track"] == p]
            x, y = piece["x_um"].to_numpy(), piece["y_um"].to_numpy()
            if xs:
                step = g.normal(0.0, np.sqrt(2 * float(D_of(d_of_piece[p])) * DT), 2)
                x = x - x[0] + xs[-1][-1] + step[0]
                y = y - y[0] + ys[-1][-1] + step[1]
            xs.append(x)
            ys.append(y)
            ds.append(np.full(x.size, d_of_piece[p]))
        x, y, d = np.concatenate(xs), np.concatenate(ys), np.concatenate(ds)
        rows.append(pd.DataFrame({"track": t, "frame": np.arange(x.size), "x_um": x, "y_um": y, "d_true": d}))
    out = pd.concat(rows, ignore_index=True)
    return out[["track", "frame", "x_um", "y_um"]], out["d_true"].to_numpy()


@pytest.mark.slow
def test_tracks_joined_from_an_80_and_a_250_nm_particle_are_cut_and_the_mixture_separates():
    # Known truth: pieces of 80 and 250 nm particles (equal numbers) joined 2–3 per track. Time-weighted
    # number fractions count positions, so the true 80 nm share is that of the positions.
    g = np.random.default_rng(41)
    d = np.where(g.random(600) < 0.5, 80.0, 250.0)
    tracks, d_pos = _joined_tracks(d, rng=42)
    kw = dict(localization_sd_um=SIGMA, **KW)
    whole, _ = sizing.size_distribution_of_tracks(tracks, split_wrong_joins=False, **kw)
    split, per_track = sizing.size_distribution_of_tracks(tracks, **kw)
    assert len(per_track) == tracks["track"].nunique()
    assert split.method["n_cuts"] > 0
    assert len(split.modes_nm) == 2
    assert split.modes_nm[0] == pytest.approx(80.0, rel=0.1)
    assert split.modes_nm[1] == pytest.approx(250.0, rel=0.1)
    # binomial SD of the position share is < 0.03 (pieces are the sampling unit); target as the benchmark
    assert split.number.mode_fractions[0] == pytest.approx(np.mean(d_pos == 80.0), abs=0.1)
    # the whole tracks mix sizes: the modes move towards each other (or merge)
    ratio_split = split.modes_nm[1] / split.modes_nm[0]
    assert len(whole.modes_nm) == 1 or whole.modes_nm[1] / whole.modes_nm[0] < ratio_split


def test_wrong_joins_between_identical_particles_leave_a_monodisperse_sample_narrow():
    # Known truth: 100 nm pieces joined 2–3 per track; a join between identical particles changes nothing.
    tracks, _ = _joined_tracks(np.full(600, 100.0), rng=43)
    dist, _ = sizing.size_distribution_of_tracks(tracks, localization_sd_um=SIGMA, **KW)
    # D50 SE ≈ 1/√(Σ N_s) < 1 %; span: see the monodisperse test above
    assert dist.d50_nm == pytest.approx(100.0, rel=0.03)
    assert dist.span < 0.3
    assert len(dist.modes_nm) == 1


def test_linking_step_limits_follow_the_spot_density():
    # λ = share × π ρ (nearest-neighbour law of a Poisson process, Chandrasekhar 1943 — from memory)
    lim = sizing.linking_step_limits(max_step_um=1.7, spots_per_um2=0.1)
    assert lim["max_step_um"] == 1.7
    assert lim["step_loss_per_um2"] == pytest.approx(sizing.COMPETING_SPOT_SHARE * math.pi * 0.1)
    assert sizing.linking_step_limits(max_step_um=None, spots_per_um2=None) == {
        "max_step_um": None,
        "step_loss_per_um2": 0.0,
    }


def test_median_of_per_track_localisation_errors_ignores_a_few_back_and_forth_joins():
    # Vestergaard 2014 per track, median over tracks; 5 % of the tracks get anti-correlated ±0.5 µm joins
    # (a linker hopping between two nearby particles), which move the pooled estimate but hardly the median.
    sigma, n_tr, n_s = 0.04, 2000, 40
    tracks = simulate(np.full(n_tr, 500.0), rng=12, steps=(n_s, n_s), sigma_um=sigma)
    kw = dict(frame_interval_s=DT, exposure_s=EXPOSURE)
    hop = tracks["track"] < n_tr // 20
    tracks.loc[hop, "x_um"] += 0.5 * (tracks.loc[hop, "frame"] % 2)
    robust = sizing.robust_localization_sd_um(tracks, **kw)
    pooled = sizing.lag1_track_estimates(tracks, **kw)["sigma_um"].iloc[0]
    # per-track SD of σ̂² ≈ a/√(d N_s) (products of MA(1) increments); median SE ≈ 1.25 SD/√n; 5 % moved to
    # +∞ shift the median to the clean 52.6 % quantile, 0.066 SD (normal quantiles)
    R = sizing.blur_coefficient(DT, EXPOSURE)
    a = 2 * float(D_of(500.0)) * DT * (1 - 2 * R) + 2 * sigma**2
    sd = a / math.sqrt(2 * n_s)
    assert abs(robust**2 - sigma**2) < 4 * 1.25 * sd / math.sqrt(n_tr) + 0.066 * sd
    assert pooled > 1.5 * sigma


def test_compiled_size_switch_path_equals_the_numpy_viterbi():
    # Reference: the same Viterbi recursion written with numpy arrays (msdkit._size_fit._switch_points_numpy,
    # Rabiner 1989), on tracks that switch between two particle sizes part-way.
    from msdkit._size_fit import StepLimits, _switch_points_numpy, switch_points

    g = np.random.default_rng()
    dt, R, n_dims = 0.033, 0.075, 2
    D_states = np.geomspace(0.5, 8.0, 40)
    w_states = g.random(40) + 0.1
    ys, tix = [], []
    for t in range(300):
        n = int(g.integers(1, 60))
        D = np.where(np.arange(n) < g.integers(0, n + 1), 6.0, 1.5)
        ys.append(g.gamma(1.0, 2 * D * dt, n))
        tix.append(np.full(n, t))
    y, tix = np.concatenate(ys), np.concatenate(tix)
    s2 = g.uniform(0.0, 0.01, 300)
    kw = dict(dt=dt, R=R, n_dims=n_dims, limits=StepLimits(max_step_um=None, loss_per_um2=0.0), p_switch=0.05)
    fast = switch_points(y, tix, s2, D_states, w_states, **kw)
    ref = _switch_points_numpy(y, tix, s2, D_states, w_states, **kw)
    assert fast.sum() > 0
    np.testing.assert_array_equal(fast, ref)


def _bincount_step_sums(tracks, cols, centre):
    """The array computation the compiled pass replaces: numpy.diff of the positions and numpy.bincount per
    track, after a pandas sort by (track, frame) and numpy.unique."""
    df = tracks.sort_values(["track", "frame"], kind="stable")
    ids, inv = np.unique(df["track"].to_numpy(), return_inverse=True)
    pos = df[cols].to_numpy(float)
    if centre:
        pos = pos - np.nanmean(pos, axis=0)
    inc = np.diff(pos, axis=0)
    ok = (inv[1:] == inv[:-1]) & (np.diff(df["frame"].to_numpy(np.int64)) == 1)
    ok &= np.all(np.isfinite(inc), axis=1)
    adj = ok[:-1] & ok[1:]
    owner = inv[:-1]
    n_tr = ids.size
    return dict(
        ids=ids,
        n_points=np.bincount(inv, minlength=n_tr),
        n_steps=np.bincount(owner[ok], minlength=n_tr),
        n_adj=np.bincount(owner[:-1][adj], minlength=n_tr),
        sq=np.bincount(owner[ok], np.sum(inc[ok] ** 2, axis=1), minlength=n_tr),
        prod=np.bincount(owner[:-1][adj], np.sum(inc[:-1][adj] * inc[1:][adj], axis=1), minlength=n_tr),
    )


def _messy_table(g, n_dims, with_nan=True):
    """Tracks with gaps, missing coordinates, one-point tracks and large offsets, rows shuffled."""
    rows = []
    for t in g.permutation(40) * 7:
        n = int(g.integers(1, 30))
        frames = np.cumsum(g.choice([1, 1, 1, 1, 2, 3], n)) + int(g.integers(0, 50))
        pos = 30.0 + np.cumsum(g.normal(0, 0.1, (n, n_dims)), axis=0)
        if with_nan and n > 4 and g.random() < 0.3:
            pos[int(g.integers(0, n)), int(g.integers(0, n_dims))] = np.nan
        rows.append(pd.DataFrame({"track": t, "frame": frames,
                                  **{c: pos[:, i] for i, c in enumerate(["x_um", "y_um", "z_um"][:n_dims])}}))
    return pd.concat(rows, ignore_index=True).sample(frac=1.0, random_state=int(g.integers(1 << 31)))


@pytest.mark.parametrize("n_dims", [1, 2, 3])
def test_one_pass_step_sums_equal_numpy_bincount_of_the_steps_bit_for_bit(n_dims):
    # Reference: numpy.diff + numpy.bincount on the pandas-sorted table (general-purpose library routines),
    # on shuffled and on ordered tables with gaps, missing coordinates and one-point tracks.
    g = np.random.default_rng()
    cols = ["x_um", "y_um", "z_um"][:n_dims]
    messy, clean = _messy_table(g, n_dims), _messy_table(g, n_dims, with_nan=False)
    for table in (messy, messy.sort_values(["track", "frame"]), clean, clean.sort_values(["track", "frame"])):
        s = sizing.track_step_sums(table, n_dims=n_dims)
        for centre, sq, prod in ((True, s.sum_sq_um2, s.sum_prod_um2),
                                 (False, s.uncentred_sum_sq_um2, s.uncentred_sum_prod_um2)):
            ref = _bincount_step_sums(table, cols, centre)
            np.testing.assert_array_equal(s.ids, ref["ids"])
            np.testing.assert_array_equal(s.n_points, ref["n_points"])
            np.testing.assert_array_equal(s.n_steps, ref["n_steps"])
            np.testing.assert_array_equal(s.n_adjacent_steps, ref["n_adj"])
            np.testing.assert_array_equal(sq, ref["sq"])
            np.testing.assert_array_equal(prod, ref["prod"])
        assert s.n_steps.sum() > 0 and s.n_adjacent_steps.sum() > 0


def test_lag1_estimates_and_robust_sigma_follow_the_bincount_sums():
    # Reference: Vestergaard et al. 2014 covariance estimate and the lag-1 D formula (module docstring)
    # evaluated on numpy.bincount sums of numpy.diff steps, with a weighted median by numpy.argsort.
    # Fixed seed (a deterministic property on random data): a random table had fewer than 20 tracks with 3
    # adjacent step pairs in 66 of 20,000 draws (measured). Seed 54 gives 30 such tracks, missing coordinates,
    # a one-point track, and a prefix holding exactly half the weight (the median's tie rule is checked too).
    g = np.random.default_rng(54)
    table = _messy_table(g, 2)
    kw = dict(frame_interval_s=DT, exposure_s=EXPOSURE, n_dims=2)
    R = sizing.blur_coefficient(DT, EXPOSURE)
    ref = _bincount_step_sums(table, ["x_um", "y_um"], centre=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        m0 = ref["sq"] / (2 * ref["n_steps"])
    est = sizing.lag1_track_estimates(table, localization_sd_um=0.02, **kw)
    np.testing.assert_array_equal(est["track"].to_numpy(), ref["ids"])
    # the same formulas evaluated in another order agree to rounding (1e-12 relative), not bit for bit
    np.testing.assert_allclose(est["mean_sq_step_um2"].to_numpy(), m0, rtol=1e-12)
    with np.errstate(invalid="ignore"):
        D_ref = (m0 - 2 * 0.02**2) / (2 * DT * (1 - 2 * R))
    np.testing.assert_allclose(est["D_um2_s"].to_numpy(), D_ref, rtol=1e-12)

    raw = _bincount_step_sums(table, ["x_um", "y_um"], centre=False)
    n, m = raw["n_steps"], raw["n_adj"]
    s2 = R * raw["sq"] / (2 * np.maximum(n, 1)) + (2 * R - 1) * raw["prod"] / (2 * np.maximum(m, 1))
    use = m >= 3
    order = np.argsort(s2[use])
    cum = np.cumsum(m[use][order]) / np.sum(m[use])
    med = math.sqrt(max(float(s2[use][order][np.searchsorted(cum, 0.5)]), 0.0))
    assert np.sum(use) >= 20
    robust = sizing.robust_localization_sd_um(table, min_adjacent_steps=3, **kw)
    assert robust == pytest.approx(med, rel=1e-12)


def test_shared_step_sums_give_the_same_size_distribution_and_estimates():
    # Reference: the same calls without shared sums (each passing over the table itself); common practice.
    sizes = np.r_[np.full(150, 80.0), np.full(150, 250.0)]
    tracks = simulate(sizes, rng=np.random.default_rng(), steps=(10, 40))
    kw = dict(frame_interval_s=DT, exposure_s=EXPOSURE, n_dims=2)
    sums = sizing.track_step_sums(tracks, n_dims=2)
    d1, p1 = sizing.size_distribution_of_tracks(tracks, **KW)
    d2, p2 = sizing.size_distribution_of_tracks(tracks, step_sums=sums, **KW)
    pd.testing.assert_frame_equal(d1.table, d2.table, check_exact=True)
    pd.testing.assert_frame_equal(p1, p2, check_exact=True)
    pd.testing.assert_frame_equal(
        sizing.lag1_track_estimates(tracks, **kw), sizing.lag1_track_estimates(tracks, step_sums=sums, **kw),
        check_exact=True,
    )
    with pytest.raises(ValueError, match="step_sums"):
        sizing.lag1_track_estimates(tracks.iloc[:-3], step_sums=sums, **kw)


def _two_brightness_table(rng, n_bright, n_dim, *, sd_bright, sd_dim, precision_factor, n_points=200):
    """Brownian tracks (D 0.05 µm²/s, 50 ms frames, no blur) of two brightness groups: the localisation SD
    of each track is ``precision_factor`` × the precision written in its spots' precision_um column."""
    parts = []
    for k, sd in enumerate([sd_bright] * n_bright + [sd_dim] * n_dim):
        xy = np.cumsum(rng.normal(0.0, math.sqrt(2 * 0.05 * 0.05), (n_points, 2)), axis=0)
        xy += rng.normal(0.0, sd, (n_points, 2))
        parts.append(pd.DataFrame({"track": k, "frame": np.arange(n_points), "x_um": xy[:, 0],
                                   "y_um": xy[:, 1], "precision_um": sd / precision_factor}))
    return pd.concat(parts, ignore_index=True)


def test_per_track_localisation_sd_follows_each_tracks_precision_for_any_mix_of_bright_and_dim():
    # Truth by construction: each track's localisation SD is 2 x its spots' stated precision (a spot fit that
    # understates its error by a common factor). The covariance-based per-track estimate (Vestergaard,
    # Blainey & Flyvbjerg 2014, Phys. Rev. E 89:022726) divided by the stated precision estimates that factor
    # without bias on every track, so the median ratio gives each group its own SD. Monte Carlo of this test
    # (40 seeds, mixes 40/160 to 160/40): largest error 4 %, SD 1.2 %; the bound is 10 %.
    rng = np.random.default_rng()
    kw = dict(frame_interval_s=0.05, exposure_s=0.0)
    for n_bright in (60, 100, 140):
        table = _two_brightness_table(rng, n_bright, 200 - n_bright, sd_bright=0.02, sd_dim=0.05,
                                      precision_factor=2.0)
        sd = sizing.precision_scaled_sd_um(table, **kw)
        assert sd.index.tolist() == list(range(200))
        assert np.allclose(sd.iloc[:n_bright], sd.iloc[0]) and np.allclose(sd.iloc[n_bright:], sd.iloc[-1])
        assert sd.iloc[0] == pytest.approx(0.02, rel=0.10)
        assert sd.iloc[-1] == pytest.approx(0.05, rel=0.10)
        # one SD for all tracks (the median of the per-track estimates) is wrong for one group by far more
        one = sizing.robust_localization_sd_um(table, **kw)
        assert max(abs(one / 0.02 - 1), abs(one / 0.05 - 1)) > 0.25


def test_per_track_localisation_sd_falls_back_when_the_table_cannot_support_it():
    # Contract (sizing.precision_scaled_sd_um): no precision column, or fewer than 20 tracks with 10 step
    # pairs, give None (the caller then uses the one robust SD); tracks without a precision get the median.
    rng = np.random.default_rng(7)
    kw = dict(frame_interval_s=0.05, exposure_s=0.0)
    table = _two_brightness_table(rng, 30, 0, sd_bright=0.03, sd_dim=0.03, precision_factor=1.0)
    assert sizing.precision_scaled_sd_um(table.drop(columns="precision_um"), **kw) is None
    assert sizing.precision_scaled_sd_um(table[table["track"] < 15], **kw) is None
    table.loc[table["track"] == 3, "precision_um"] = np.nan
    sd = sizing.precision_scaled_sd_um(table, **kw)
    assert sd.loc[3] == pytest.approx(float(np.median(sd.drop(3))))


def test_prominent_peaks_match_scipy_find_peaks():
    # Reference: scipy.signal.find_peaks(x, prominence=p) (general-purpose reference library), on random
    # curves with flat tops, flat valleys, zero runs and ties, at several prominence thresholds.
    from scipy.signal import find_peaks

    g = np.random.default_rng()
    for _ in range(300):
        n = int(g.integers(3, 60))
        x = np.round(g.random(n) * g.integers(1, 6), 1)  # few distinct values: plateaus and ties
        x[g.random(n) < 0.2] = 0.0
        for p in (0.0, 0.05, 0.2, 0.5, 1.0):
            expected, _ = find_peaks(x, prominence=p)
            assert np.array_equal(sizing._prominent_peaks(x, p), expected), (x.tolist(), p)
    i = np.arange(160)
    smooth = np.exp(-0.5 * ((i - 50) / 8.0) ** 2) + 0.4 * np.exp(-0.5 * ((i - 110) / 6.0) ** 2)
    for p in (0.01, 0.1, 0.39, 0.41):
        assert np.array_equal(sizing._prominent_peaks(smooth, p), find_peaks(smooth, prominence=p)[0])
