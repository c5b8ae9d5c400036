"""Compiled fast paths (msdkit._msd_kernels) give what the plain numpy expressions they replace give.

Each check names its reference: a numpy expression written out here (numpy is the general-purpose reference
library), compared bit for bit where the compiled loop does the same operations in the same order, and to
1e-10 relative (1e-14 absolute for values that cancel to near 0) where only the order of a sum differs.
"""

import numpy as np
import pytest

from msdkit import _msd_kernels as k
from msdkit import motion_models as mm


def _grid_reference(P, w, shapes, noise, n_axes, drop_zero=False):
    """The numpy chunk loop of motion_models._profile_grid: best noise ratio, scale and log-likelihoods."""
    valid, logdet, Q = mm._grid_terms(w, shapes, noise, drop_zero)
    S, R, F = Q.shape
    Qt = np.ascontiguousarray(Q.reshape(S * R, F).T)
    W = float(w.sum())
    low = np.min(np.where(valid, logdet, np.inf), axis=1, keepdims=True)
    low = np.where(np.isfinite(low), low, 0.0)
    rank = np.where(valid, np.exp((np.where(valid, logdet, 0.0) - low) / W), np.inf)
    sc = (P @ Qt).reshape(P.shape[0], S, R)
    sc /= n_axes * W
    np.maximum(sc, 1e-300, out=sc)
    i = np.argmin(sc * rank, axis=-1)
    srows = np.arange(S)[None, :]
    ll3 = np.empty((P.shape[0], S, 3))
    for j in range(3):
        r = np.clip(i + (j - 1), 0, R - 1)
        v = np.take_along_axis(sc, r[..., None], -1)[..., 0]
        with np.errstate(divide="ignore"):
            ll3[..., j] = np.where(valid[srows, r], -n_axes * (logdet[srows, r] + W * np.log(v) + W), -np.inf)
    scale = np.take_along_axis(sc, i[..., None], -1)[..., 0]
    return i, scale, ll3


@pytest.mark.parametrize("n_steps", [9, 40, 57])
def test_compiled_noise_ratio_search_equals_numpy_argmin_bit_for_bit(n_steps):
    # Reference: numpy.argmin / take_along_axis / log on the full chunk (the former numpy code path).
    g = np.random.default_rng(n_steps)
    steps = g.normal(size=(400, n_steps, 2)) * 0.1 + g.normal(size=(400, 1, 2)) * 0.2
    bank = mm._bank(n_steps, 0.4)
    P = mm.periodograms(steps, bank.taper)
    P[5] = 0.0  # a track standing still: every scale at the 1e-300 floor, ties resolved to the first index
    for shapes, dz in ((bank.fbm, False), (bank.conf, False), (bank.fbm[18:19], True)):
        best, ratio, idx, scale = mm._profile_grid(P, bank.weights, shapes, bank.noise, 2, dz)
        i_ref, scale_ref, ll3 = _grid_reference(P, bank.weights, shapes, bank.noise, 2, dz)
        np.testing.assert_array_equal(idx, i_ref)
        np.testing.assert_array_equal(scale, scale_ref)
        interior = (idx >= 1) & (idx <= mm.NOISE_RATIO_GRID.size - 2)
        refined = mm._parabola(*np.moveaxis(ll3, -1, 0))[1]
        np.testing.assert_array_equal(np.where(interior, refined, ll3[..., 1]), best)


def test_compiled_noise_ratio_search_takes_the_first_nan_as_numpy_argmin():
    # Reference: numpy.argmin, which returns the position of the first NaN when there is one.
    rank = np.ones((2, 5))
    sc = np.array([[3.0, 1.0, np.nan, 0.5, 2.0, 4.0, 4.0, 1.0, 1.0, 9.0]])
    idx = np.empty((1, 2), np.int64)
    v3 = np.empty((1, 2, 3))
    k.best_noise_ratio(sc, 1.0, rank, idx, v3)
    np.testing.assert_array_equal(idx[0], np.argmin(sc.reshape(2, 5), axis=-1))
    np.testing.assert_array_equal(v3[0, 1], [4.0, 1.0, 1.0])


@pytest.mark.parametrize("n_axes, n_steps", [(1, 57), (2, 57), (3, 57), (2, 499)])
def test_periodograms_with_free_mean_equal_the_numpy_expressions_bit_for_bit(n_axes, n_steps):
    # Reference: numpy.fft.rfft of the tapered steps, Σ_axes (re² + im²), and the same after F − mean·H
    # (499 steps: several chunks of tracks)
    g = np.random.default_rng(n_axes)
    steps = g.normal(size=(150, n_steps, n_axes)) * 10.0 ** g.uniform(-3, 3, size=(150, 1, 1)) + 2.0
    taper = mm.split_cosine_taper(n_steps)
    P, Pd = mm._periodograms_with_free_mean(steps, taper)
    blk = steps.transpose(0, 2, 1)
    F = np.fft.rfft(blk * taper, axis=-1)
    sq = F.real * F.real
    sq += F.imag * F.imag
    np.testing.assert_array_equal(P, np.sum(sq, axis=1))
    F -= blk.mean(axis=-1, keepdims=True) * np.fft.rfft(taper)
    sq = F.real * F.real
    sq += F.imag * F.imag
    np.testing.assert_array_equal(Pd, np.sum(sq, axis=1))


@pytest.mark.parametrize("shape", [(40, 499, 2), (30, 7, 3), (6, 300, 1), (0, 5, 2)])
def test_end_to_end_sums_equal_numpy_sum(shape):
    # Reference: numpy.sum(steps, axis=1).
    g = np.random.default_rng(0)
    steps = g.normal(size=shape) * 10.0 ** g.uniform(-4, 4, size=shape)
    np.testing.assert_array_equal(mm._end_to_end(steps), steps.sum(axis=1))


def test_fit_step_models_is_unchanged_by_the_compiled_paths(monkeypatch):
    # Reference: fit_step_models with numpy's sum for the end-to-end steps (the compiled helper switched off).
    g = np.random.default_rng()
    steps = g.normal(size=(200, 49, 2)) * 0.1 + g.normal(size=(200, 1, 2)) * 0.05
    fast = mm.fit_step_models(steps, exposure_ratio=0.5)
    monkeypatch.setattr(mm, "_end_to_end", lambda s: s.sum(axis=1))
    slow = mm.fit_step_models(steps, exposure_ratio=0.5)
    for name in fast.__dataclass_fields__:
        np.testing.assert_array_equal(getattr(fast, name), getattr(slow, name), err_msg=name)


def _step_statistics_numpy(X):
    """The numpy formulas of classify._step_statistics_group for 2D tracks (matrix products and einsum)."""
    g, n, nd = X.shape
    d = np.diff(X, axis=1)
    dc = d - d.mean(axis=1, keepdims=True)
    num = np.einsum("gij,gij->g", dc[:, 1:], dc[:, :-1])
    den = np.einsum("gij,gij->g", dc, dc)
    r2 = np.einsum("gij,gij->gi", d, d)
    m2 = r2.mean(axis=1)
    m4 = (r2 * r2).mean(axis=1)
    path = np.sqrt(r2).sum(axis=1)
    end = np.linalg.norm(X[:, -1] - X[:, 0], axis=1)
    c = np.stack([np.cov(x.T) for x in X])
    ev = np.linalg.eigvalsh(c)
    return np.column_stack([num / den, m4 / ((1.0 + 2.0 / nd) * m2 * m2) - 1.0, end / path,
                            ((ev[:, -1] - ev[:, 0]) / (ev[:, -1] + ev[:, 0])) ** 2])


def test_compiled_step_statistics_equal_the_numpy_formulas():
    # Reference: numpy.diff / einsum / numpy.cov / numpy.linalg.eigvalsh per group (sums in another order:
    # 1e-10 relative, 1e-14 absolute for the statistics that are near 0 for Brownian steps).
    from msdkit.classify import _step_statistics_group

    g = np.random.default_rng()
    X = np.cumsum(g.normal(size=(300, 60, 2)), axis=1) + g.normal(size=(300, 1, 2)) * 50.0
    X[:10] += np.arange(60)[None, :, None] * 0.7  # directed tracks: straightness near 1
    np.testing.assert_allclose(_step_statistics_group(X), _step_statistics_numpy(X), rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize(("n", "n_lags", "n_par"), [(1, 3, 2), (60, 10, 2), (200, 10, 3)])
def test_batched_quadratic_forms_equal_numpy_einsum_bit_for_bit(n, n_lags, n_par):
    # Reference: numpy.einsum (no optimisation) on the rows of C that the subset needs, as the Gauss-Newton
    # fits of msdkit.estimators.anomalous computed them.
    g = np.random.default_rng(n)
    A = g.normal(size=(n + 7, n_lags, n_lags))
    C = A @ A.transpose(0, 2, 1)
    rows = np.sort(g.choice(n + 7, n, replace=False))
    r = g.normal(size=(n, n_lags))
    J = g.normal(size=(n, n_lags, n_par))
    np.testing.assert_array_equal(k.rows_quadratic_form(r, C, rows), np.einsum("nl,nlm,nm->n", r, C[rows], r))
    np.testing.assert_array_equal(k.rows_jt_c(J, C, rows), np.einsum("nlp,nlm->npm", J, C[rows]))
    np.testing.assert_array_equal(k.sandwich(J, C[rows]), np.einsum("nlp,nlm,nmq->npq", J, C[rows], J))
    Cb = np.broadcast_to(C[0], (n, n_lags, n_lags))  # one weight matrix for all rows (read-only view)
    np.testing.assert_array_equal(k.sandwich(J, Cb), np.einsum("nlp,nlm,nmq->npq", J, Cb, J))
    np.testing.assert_array_equal(k.rows_quadratic_form(r, Cb, np.arange(n)),
                                  np.einsum("nl,nlm,nm->n", r, Cb, r))


def test_bootstrap_counts_equal_numpy_bincount():
    # Reference: numpy.bincount of each replicate's draws (the former implementation), same generator state.
    from msdkit.estimators.alpha_fits import _boot_counts

    T, nb = 137, 23
    got = _boot_counts(np.random.default_rng(5), T, nb)
    draws = np.random.default_rng(5).integers(0, T, (nb, T))
    ref = np.stack([np.bincount(d, minlength=T) for d in draws]).astype(float)
    np.testing.assert_array_equal(got, ref)
    assert got.dtype == np.float64


@pytest.mark.parametrize("n", [1, 5, 7, 8, 9, 39, 127, 128, 129, 250, 499, 4097])
def test_compiled_sum_follows_numpy_sum_bit_for_bit(n):
    # Reference: numpy.sum of a contiguous array (pairwise summation).
    g = np.random.default_rng(n)
    a = g.normal(size=n) * 10.0 ** g.uniform(-8, 8, size=n)
    assert k.numpy_sum(a, 0, n) == np.sum(a)
    assert k.numpy_sum(a, 1, n - 1) == np.sum(a[1:])


def _em_reference(L, n_iter):
    """The numpy EM loop of classify._alpha_posterior."""
    prior = np.full(L.shape[1], 1.0 / L.shape[1])
    for _ in range(n_iter):
        post = L * prior
        post /= np.maximum(post.sum(axis=1, keepdims=True), 1e-300)
        new = post.mean(axis=0)
        done = np.max(np.abs(new - prior)) < 1e-7
        prior = new
        if done:
            break
    return prior


def test_compiled_em_steps_equal_the_numpy_loop_bit_for_bit():
    # Reference: the numpy expressions (row sums, column means) of the empirical-Bayes EM loop.
    g = np.random.default_rng()
    centre, width = g.uniform(0.2, 1.8, (3000, 1)), g.uniform(0.05, 1.0, (3000, 1))
    prof = -0.5 * ((np.linspace(0, 2, 39)[None, :] - centre) / width) ** 2
    L = np.exp(prof - prof.max(axis=1, keepdims=True))
    L[7] = 0.0  # a row of zeros: its sum is floored at 1e-300
    start = np.full(39, 1.0 / 39)
    for n_iter in (1, 3, 50, 400):  # 400: runs to the stopping rule
        np.testing.assert_array_equal(k.em_mixing_weights(L, start, n_iter, 1e-7), _em_reference(L, n_iter))


def _amplitude_reference(P, w, shape, noise, r, i_r, n_axes, N, taper):
    """The numpy expressions that motion_models.amplitude_at_alpha used per track."""
    W = w.sum()
    spec = shape[None, :] + r[:, None] * noise[None, :]
    bad = np.any(spec < 0.5 * shape[None, :], axis=1)
    r = np.where(bad, mm.NOISE_RATIO_GRID[i_r], r)
    spec = np.maximum(shape[None, :] + r[:, None] * noise[None, :], 1e-300)
    A = np.maximum(np.sum(w[None, :] * P / spec, axis=1) / (n_axes * W), 1e-300)
    S = A[:, None] * spec
    g1 = A[:, None] * shape[None, :] / S
    g2 = noise[None, :] / S
    F11 = n_axes * np.sum(w * g1 * g1, axis=1)
    F12 = n_axes * np.sum(w * g1 * g2, axis=1)
    F22 = n_axes * np.sum(w * g2 * g2, axis=1)
    det = F11 * F22 - F12**2
    var = np.where(det > 0, F22 / np.where(det > 0, det, 1.0), 1.0 / F11)
    var = var * N * np.sum(taper**4)
    return np.log(A), np.sqrt(var)


@pytest.mark.parametrize("n_steps", [9, 49, 499])
def test_compiled_amplitudes_equal_the_numpy_expressions_bit_for_bit(n_steps):
    # Reference: numpy expressions (numpy.sum along the frequencies, pairwise) of the amplitude and its
    # Whittle-information variance; a track standing still and noise ratios forced off the allowed range
    # exercise the floors and the fallback to the grid ratio.
    g = np.random.default_rng(n_steps)
    steps = g.normal(size=(300, n_steps, 2)) * g.uniform(0.01, 1.0, (300, 1, 1))
    bank = mm._bank(n_steps, 0.3)
    P = mm.periodograms(steps, bank.taper)
    P[4] = 0.0
    shape = mm.expected_periodogram(mm._blurred_power(np.arange(n_steps + 1.0), 0.7, 0.3), bank.taper)
    _, r, i_r, _ = mm._profile_grid(P, bank.weights, shape[None, :], bank.noise, 2)
    r, i_r = r[:, 0].copy(), i_r[:, 0]
    r[:20] = -0.3  # below the allowed range: falls back to the grid value
    with np.errstate(all="ignore"):  # the still track overflows (numpy warns, the compiled loop does not)
        ref = _amplitude_reference(P, bank.weights, shape, bank.noise, r, i_r, 2, n_steps, bank.taper)
    A, var = k.amplitude_information(P, bank.weights, shape, bank.noise, r, mm.NOISE_RATIO_GRID[i_r], 2,
                                     bank.weights.sum(), n_steps, float(np.sum(bank.taper**4)))
    np.testing.assert_array_equal(np.log(A), ref[0])
    np.testing.assert_array_equal(np.sqrt(var), ref[1])


@pytest.mark.parametrize("dtype", [np.int64, np.int32, np.float64, np.float32])
def test_fit_cache_key_sums_equal_numpy_sums(dtype):
    # Reference: numpy sums of the column, of the column weighted row by row within 4096-row blocks and by
    # block, and of the rows after the last full block (1e-12 relative: another order of the same sums).
    from msdkit.classify import _CHECK_W_IN

    g = np.random.default_rng(1)
    v = (g.normal(size=3 * 4096 + 1234) * 1000).astype(dtype)
    x = v.astype(np.float64)
    k_full = x.size // 4096
    blocks = x[: k_full * 4096].reshape(k_full, 4096)
    ref = (x.sum(), (blocks @ _CHECK_W_IN) @ (1.0 + 0.5 * np.cos(np.arange(k_full) * 0.5698402909980532)),
           x[k_full * 4096 :] @ _CHECK_W_IN[: x.size - k_full * 4096])
    np.testing.assert_allclose(k.column_sums(v, _CHECK_W_IN, 0.5698402909980532), ref, rtol=1e-12)


# ------------------------------------------------------------------------------ stages side by side (threads)
def _small_tracks(seed=3, drift_um_s=0.0):
    from msdkit.simulate import brownian_positions, positions_to_tracks

    g = np.random.default_rng(seed)
    pos = brownian_positions(60, 60, D_um2_s=1.0, frame_interval_s=0.05, exposure_s=0.02,
                             localization_sd_um=0.03, drift_um_s=[drift_um_s, 0.0], rng=seed)
    return positions_to_tracks(pos, frame_interval_s=0.05, lengths=g.integers(12, 61, 60))


@pytest.mark.parametrize("drift_um_s", [0.0, 3.0])
def test_analysis_in_two_threads_gives_the_numbers_of_one_thread(monkeypatch, drift_um_s):
    # Reference: the same analysis with every stage run in order in one thread (OMP_NUM_THREADS=1, as in a
    # worker process); the second thread only moves independent stages, so every number is identical. With
    # a drift the step-model fits started on the uncorrected tracks are not used (fitted again).
    from msdkit import _threads, classify
    from msdkit._threads import analysis_threads
    from msdkit.pipeline import analyze_tracks

    tracks = _small_tracks(drift_um_s=drift_um_s)
    kw = dict(frame_interval_s=0.05, exposure_s=0.02)
    monkeypatch.setenv("OMP_NUM_THREADS", "1")
    assert analysis_threads() == 1
    classify._FIT_CACHE.clear()
    one = analyze_tracks(tracks, **kw)
    monkeypatch.setattr(_threads, "analysis_threads", lambda **_: 2)  # two threads whatever the load
    monkeypatch.setenv("MSDKIT_THREADS", "2")  # and whatever the table's size
    assert _threads.Beside(rows=len(tracks)).threaded
    classify._FIT_CACHE.clear()
    two = analyze_tracks(tracks, **kw)
    for a, b in ((one.track_fits, two.track_fits), (one.ensemble_msd, two.ensemble_msd),
                 (one.size_table, two.size_table)):
        assert list(a.columns) == list(b.columns)
        for c in a.columns:
            np.testing.assert_array_equal(a[c].to_numpy(), b[c].to_numpy(), err_msg=c)
    assert repr(one.summary) == repr(two.summary)
    assert one.summary["drift_corrected"] == (drift_um_s > 0)


def test_thread_limit_follows_the_environment_of_worker_processes(monkeypatch):
    # Common practice: worker processes get OMP_NUM_THREADS=1 (msdkit's local executor, Dask's nanny).
    from msdkit._threads import analysis_threads

    monkeypatch.delenv("NUMBA_NUM_THREADS", raising=False)
    monkeypatch.setenv("OMP_NUM_THREADS", "1")
    assert analysis_threads(load=0.0) == 1
    monkeypatch.delenv("OMP_NUM_THREADS")
    monkeypatch.setenv("NUMBA_NUM_THREADS", "1")
    assert analysis_threads(load=0.0) == 1
    monkeypatch.delenv("NUMBA_NUM_THREADS")
    import os

    n = len(os.sched_getaffinity(0))
    assert analysis_threads(load=0.0) == n
    assert analysis_threads(load=n - 0.5) == n  # a CPU's worth left free by the other jobs
    assert analysis_threads(load=float(n)) == 1  # other jobs keep the CPUs busy: one thread
    from msdkit._threads import Beside

    assert not Beside(rows=1000).threaded  # a small table: one thread whatever the load
    monkeypatch.setenv("MSDKIT_THREADS", "2")
    assert Beside(rows=1000).threaded == (n >= 2)  # unless the count is set


@pytest.mark.parametrize("threads", [1, 2])
def test_stages_beside_the_caller_keep_their_order_and_hand_back_errors(threads):
    # Reference: calling the functions one after another in one thread (the same order, the same exception).
    from msdkit._threads import Beside

    done = []
    with Beside(threads) as beside:
        first = beside.submit(lambda: done.append(1) or "a")
        second = beside.submit(lambda: done.append(2) or "b")
        bad = beside.submit(lambda: 1 / 0)
    assert (first.result(), second.result()) == ("a", "b")
    with pytest.raises(ZeroDivisionError):
        bad.result()
    assert done == [1, 2]


def _g_dg_reference(lags, alpha):
    """g_alpha(t) and its alpha derivative as msdkit.estimators.anomalous._Lags.g_dg computed them with every
    branch evaluated and masked by numpy.where (the numpy expressions the branch skipping replaces)."""
    a = alpha
    ta = np.exp(a * lags.lt)
    T, u = lags.T, lags.u
    c = (a + 1.0) * (a + 2.0)
    dc = 2.0 * a + 3.0
    pp = np.exp((a + 2.0) * lags.lp)
    pm = np.where(lags.zero, 0.0, np.exp((a + 2.0) * lags.lm))
    p0 = np.exp((a + 2.0) * lags.lt)
    num = pp + pm - 2.0 * p0
    dnum = pp * lags.lp + np.where(lags.zero, 0.0, pm * lags.lm) - 2.0 * p0 * lags.lt
    direct = num / (T * T * c)
    d_direct = dnum / (T * T * c) - direct * dc / c
    A = a * (a - 1) / 12.0
    B = a * (a - 1) * (a - 2) * (a - 3) / 360.0
    dA = (2 * a - 1) / 12.0
    dB = (4 * a**3 - 18 * a**2 + 22 * a - 6) / 360.0
    ser = ta * (1.0 + A * u * u + B * u**4)
    d_ser = ser * lags.lt + ta * (dA * u * u + dB * u**4)
    Ta = np.exp(a * lags.lT)
    tail = 2.0 * Ta / c
    d_tail = tail * lags.lT - tail * dc / c
    return np.where(lags.series, ser, direct) - tail, np.where(lags.series, d_ser, d_direct) - d_tail


@pytest.mark.parametrize("t, exposure_s", [
    (np.array([0.05, 0.1, 0.2, 0.5, 1.0]), 0.02),  # the direct branch only
    (np.array([0.05, 0.1, 0.2, 0.5, 1.0]), 0.05),  # a lag within the exposure (t - T = 0)
    (np.array([0.05, 0.5, 5.0, 50.0]), 0.02),  # both branches (T/t < 0.01 from 5 s on)
    (np.array([5.0, 50.0]), 0.02),  # the series only
])
def test_blurred_power_law_skips_only_branches_no_lag_takes_bit_for_bit(t, exposure_s):
    # Reference: the same numpy expressions with both branches evaluated and masked by numpy.where.
    from msdkit.estimators import anomalous as an

    lags = an._Lags(t, exposure_s)
    alpha = np.linspace(0.05, 1.95, 31)[:, None]
    g, dg = lags.g_dg(alpha)
    g_ref, dg_ref = _g_dg_reference(lags, alpha)
    np.testing.assert_array_equal(g, g_ref)
    np.testing.assert_array_equal(dg, dg_ref)


def test_step_fits_started_ahead_stop_when_told_and_keep_nothing():
    # Reference: classify_tracks fitting on its own (the contract of the fit cache: only finished fits of
    # exactly these tracks are reused).
    import threading

    from msdkit import classify

    tracks = _small_tracks(seed=5)
    kw = dict(frame_interval_s=0.05, exposure_s=0.02)
    classify._FIT_CACHE.clear()
    stop = threading.Event()
    stop.set()
    assert classify.prepare_step_fits(tracks, stop=stop, **kw) is False
    assert not classify._FIT_CACHE
    assert classify.prepare_step_fits(tracks, stop=threading.Event(), **kw) is True
    assert len(classify._FIT_CACHE) == 1
    ahead = classify.classify_tracks(tracks, **kw)
    classify._FIT_CACHE.clear()
    alone = classify.classify_tracks(tracks, **kw)
    for c in alone.columns:
        np.testing.assert_array_equal(ahead[c].to_numpy(), alone[c].to_numpy(), err_msg=c)


def test_msdkit_threads_sets_the_count_whatever_the_load_within_the_caps(monkeypatch):
    # Contract (msdkit._threads.analysis_threads): MSDKIT_THREADS replaces the load rule, never the caps.
    import os

    from msdkit._threads import analysis_threads

    monkeypatch.delenv("OMP_NUM_THREADS", raising=False)
    monkeypatch.delenv("NUMBA_NUM_THREADS", raising=False)
    n = len(os.sched_getaffinity(0))
    monkeypatch.setenv("MSDKIT_THREADS", "2")
    assert analysis_threads(load=n + 5.0) == min(n, 2)
    monkeypatch.setenv("OMP_NUM_THREADS", "1")
    assert analysis_threads(load=0.0) == 1
    monkeypatch.setenv("MSDKIT_THREADS", "zero")  # not a count: the load rule applies
    monkeypatch.delenv("OMP_NUM_THREADS")
    assert analysis_threads(load=n + 5.0) == 1


@pytest.mark.parametrize("shape", [(1, 1), (37, 5), (2003, 83)])
def test_size_fit_products_equal_in_order_sums_and_numpy_matmul(shape):
    # reference: the same sums written out in numpy, term after term in the kernels' order (bit for bit), and
    # numpy's matmul (BLAS; its own order of the sums) to 1e-13 relative
    g = np.random.default_rng(shape[0])
    L = g.random(shape) * g.lognormal(0.0, 2.0, shape)
    w = g.random(shape[1])
    r = g.random(shape[0])
    dens = k.mixture_density(np.ascontiguousarray(L.T), w, 1e-300, np.empty(shape[0]))
    sums = k.row_weighted_sums(L, r, np.empty(shape[1]))
    ref_dens = np.zeros(shape[0])
    for j in range(shape[1]):
        ref_dens = ref_dens + L[:, j] * w[j]
    ref_sums = np.zeros(shape[1])
    for i in range(shape[0]):
        ref_sums = ref_sums + L[i] * r[i]
    assert np.array_equal(dens, np.maximum(ref_dens, 1e-300))
    assert np.array_equal(sums, ref_sums)
    np.testing.assert_allclose(dens, L @ w, rtol=1e-13)
    np.testing.assert_allclose(sums, L.T @ r, rtol=1e-13)


def test_size_fit_density_floor_keeps_nan_as_numpy_maximum():
    # Reference: numpy.maximum (general-purpose reference library), which keeps NaN.
    L = np.array([[np.nan, 1.0], [0.0, 0.0], [1e-310, 0.0]])
    got = k.mixture_density(np.ascontiguousarray(L.T), np.ones(2), 1e-300, np.empty(3))
    want = np.maximum(L @ np.ones(2), 1e-300)  # numpy.maximum propagates NaN
    assert np.isnan(got[0]) and np.array_equal(got[1:], want[1:])
