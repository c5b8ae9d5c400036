"""Engine of :func:`msdkit.sizing.size_distribution`: the per-track kernel and penalised maximum likelihood.

Private module; see the sizing module docstring for the model.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from .errors import expected_got

_N_FOLDS = 5
# Penalty strengths per unit track weight, tried by cross-validation from strong to weak in decades; below
# _STRENGTH_MIN only while the weakest is still clearly the best, down to _STRENGTH_FLOOR.
_STRENGTH_MAX, _STRENGTH_MIN, _STRENGTH_FLOOR = 10.0, 1e-6, 1e-8
_MIN_TRACKS_CV = 50
_MAX_TRACKS_CV = 5000  # larger samples choose the strength on a random subset (a slightly stronger one)


# ----------------------------------------------------------------------------------------------------------
# Kernel
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Tracks:
    """Per-track data the kernel needs (arrays of equal length)."""

    y: np.ndarray  # mean squared lag-1 step per axis, µm²
    n: np.ndarray  # lag-1 steps
    m: np.ndarray  # neighbouring step pairs
    s2: np.ndarray  # σ², µm²
    D: np.ndarray  # D̂, µm²/s
    weight: np.ndarray
    n_points: np.ndarray


@dataclass(frozen=True)
class StepLimits:
    """What linking does to the steps it keeps (2-D tracking in the image plane).

    ``max_step_um``: the joining radius; no kept step is longer. ``loss_per_um2`` (λ): a true step of squared
    length r² is kept with probability ∝ exp(−λ r²), as when any other spot nearer than r can take the join
    (Poisson competitors of density ρ: exp(−π ρ r²), so λ = π ρ_eff).
    """

    max_step_um: float | None = None
    loss_per_um2: float = 0.0

    @property
    def active(self) -> bool:
        return self.max_step_um is not None or self.loss_per_um2 > 0


NO_LIMITS = StepLimits()


def _step_moments(a, n_dims, limits: StepLimits):
    """Mean and variance of one step's squared length per axis, y = |Δr|²/d, given per-axis variance a.

    Without limits y ~ Gamma(d/2, 2a/d). With limits (2-D only), s = |Δr|² is exponential with mean 2a,
    tilted by exp(−λ s) (mean μ' = 1/(1/(2a) + λ)) and truncated at s < M = max_step²; its moments are
    those of a truncated exponential (t = M/μ'): E s = μ'(1 − t/(eᵗ − 1)), Var s = μ'²(1 − t² eᵗ/(eᵗ − 1)²).
    """
    if n_dims != 2 or not limits.active:
        return a, 2 * a**2 / n_dims
    mu = 1.0 / (1.0 / (2 * a) + limits.loss_per_um2)
    if limits.max_step_um is None:
        return mu / 2, mu**2 / 4
    M = float(limits.max_step_um) ** 2
    t = M / mu
    small = t < 1e-2
    ts = np.where(small, 1.0, t)
    with np.errstate(over="ignore", invalid="ignore"):
        em1 = np.expm1(ts)
        frac = np.where(ts > 700, 0.0, ts / em1)
        mean_s = np.where(small, mu * (t / 2 - t**2 / 12), mu * (1 - frac))
        var_big = np.where(ts > 350, 1.0, 1 - frac * frac * np.exp(np.minimum(ts, 350)))
        var_s = np.where(small, M * M / 12, mu**2 * var_big)
    return mean_s / 2, var_s / 4


def _gamma_shape_scale(D, tr: _Tracks, dt, R, n_dims, limits: StepLimits = NO_LIMITS):
    """Shape and scale of the Gamma law of y for true D (broadcast: D over columns, tracks over rows)."""
    a = 2 * D * dt * (1 - 2 * R) + 2 * tr.s2[:, None]
    b = 2 * D * dt * R - tr.s2[:, None]
    n = tr.n[:, None]
    if not limits.active:
        var = 2 * (n * a**2 + 2 * tr.m[:, None] * b**2) / (n_dims * n**2)
        return a**2 / var, var / a
    mean, var_step = _step_moments(a, n_dims, limits)
    shrink = mean / a  # neighbouring steps' covariance shrinks with them (approximation)
    var = (n * var_step + 2 * tr.m[:, None] * (2 / n_dims) * (b * shrink) ** 2) / n**2
    return mean**2 / var, var / mean


def _log_kernel(D_grid, tr: _Tracks, dt, R, n_dims, limits: StepLimits = NO_LIMITS) -> np.ndarray:
    """Log p(y_i | D_k): rows tracks, columns grid."""
    k, theta = _gamma_shape_scale(D_grid[None, :], tr, dt, R, n_dims, limits)
    y = tr.y[:, None]
    return (k - 1) * np.log(y) - y / theta - k * np.log(theta) - special.gammaln(k)


def _tracks_from_fits(track_fits, dt, R, n_dims, localization_sd_um, weighting) -> tuple[_Tracks, str, int]:
    if "D_um2_s" not in track_fits.columns:
        raise ValueError(
            expected_got(
                "track_fits",
                "a D_um2_s column",
                list(track_fits.columns),
                "Pass the table from lag1_track_estimates (or fit_tracks).",
            )
        )
    if "n_steps" in track_fits.columns:
        n = track_fits["n_steps"].to_numpy(float)
    elif "n_points" in track_fits.columns:
        n = track_fits["n_points"].to_numpy(float) - 1
    else:
        raise ValueError(
            expected_got(
                "track_fits",
                "an n_steps or n_points column",
                list(track_fits.columns),
                "Pass the table from lag1_track_estimates.",
            )
        )
    n_points = track_fits["n_points"].to_numpy(float) if "n_points" in track_fits.columns else n + 1
    m = track_fits["n_adjacent_steps"].to_numpy(float) if "n_adjacent_steps" in track_fits.columns else n - 1
    exact = "mean_sq_step_um2" in track_fits.columns
    if localization_sd_um is not None:
        s = np.full(len(track_fits), float(localization_sd_um))
    elif "sigma_um" in track_fits.columns:
        s = track_fits["sigma_um"].to_numpy(float)
        med = np.nanmedian(np.where(np.isfinite(s) & (s >= 0), s, np.nan)) if np.any(np.isfinite(s)) else 0.0
        s = np.where(np.isfinite(s) & (s >= 0), s, med if np.isfinite(med) else 0.0)
    else:
        s = np.zeros(len(track_fits))
    s2 = s**2
    D = track_fits["D_um2_s"].to_numpy(float)
    y = track_fits["mean_sq_step_um2"].to_numpy(float) if exact else 2 * dt * (1 - 2 * R) * D + 2 * s2
    if weighting == "time":
        w = n_points.copy()
    elif weighting == "track":
        w = np.ones_like(n)
    else:
        raise ValueError(
            expected_got(
                "weighting",
                "'time' or 'track'",
                weighting,
                "'time' counts particles as seen at any instant (default).",
            )
        )
    ok = np.isfinite(y) & (y > 0) & np.isfinite(n) & (n >= 1) & np.isfinite(D) & np.isfinite(s2)
    n_dropped = int(np.sum(~ok))
    m = np.clip(np.where(np.isfinite(m), m, n - 1), 0, None)
    tr = _Tracks(y=y[ok], n=n[ok], m=m[ok], s2=s2[ok], D=D[ok], weight=w[ok], n_points=n_points[ok])
    kernel = "lag1 gamma (exact moments)" if exact else "lag1 gamma (D_um2_s taken as a lag-1 estimate)"
    return tr, kernel, n_dropped


# ----------------------------------------------------------------------------------------------------------
# Penalised maximum likelihood on a log grid
# ----------------------------------------------------------------------------------------------------------
class _Basis:
    """θ(u) = −(u − μ)²/(2 s²) + B c on the grid u = ln d.

    B spans the complement of the quadratics (the null space of the third-difference penalty), in the
    eigenbasis of the penalty, so the penalty is Σ_j Λ_j c_j² exactly and every log-normal costs nothing.
    """

    def __init__(self, u: np.ndarray):
        K = u.size
        step = float(np.mean(np.diff(u)))
        ut = (u - u.mean()) / (u.max() - u.min())
        q, _ = np.linalg.qr(np.stack([np.ones(K), ut, ut**2], axis=1), mode="complete")
        comp = q[:, 3:]
        d3 = np.diff(np.eye(K), n=3, axis=0) @ comp
        lam, vec = np.linalg.eigh(d3.T @ d3)
        self.u = u
        self.penalty = (
            np.clip(lam, 0.0, None) / step**5
        )  # integral of the squared third derivative per unit c²
        self.B = comp @ vec

    def theta(self, mu, log_s, c):
        return -0.5 * (self.u - mu) ** 2 * np.exp(-2 * _clip_log_s(log_s)) + self.B @ c


_LOG_S_RANGE = (-12.0, 12.0)  # width of the log-normal part, ln units: far beyond any grid


def _clip_log_s(log_s):
    return float(np.clip(log_s, *_LOG_S_RANGE))


def _lbfgs(fun, x0, *, max_iter=400, tol=1e-10, memory=10):
    """Minimise a smooth function with limited-memory BFGS and backtracking (Nocedal & Wright 2006, alg. 7.5).

    Kept in numpy on purpose: tiny problems, no threaded linear-algebra calls per iteration.
    """
    x = np.asarray(x0, dtype=float).copy()
    f, g = fun(x)
    S: list[np.ndarray] = []
    Y: list[np.ndarray] = []
    small = 0
    for _ in range(max_iter):
        q = g.copy()
        alphas = []
        for s_, y_ in zip(reversed(S), reversed(Y), strict=True):
            a = (s_ @ q) / (y_ @ s_)
            alphas.append(a)
            q -= a * y_
        if S:
            q *= (S[-1] @ Y[-1]) / (Y[-1] @ Y[-1])
        for (s_, y_), a in zip(zip(S, Y, strict=True), reversed(alphas), strict=True):
            q += s_ * (a - (y_ @ q) / (y_ @ s_))
        d = -q
        slope = g @ d
        if not slope < 0:
            d, slope = -g, -(g @ g)
            S.clear()
            Y.clear()
        t = 1.0
        while True:
            x_new = x + t * d
            f_new, g_new = fun(x_new)
            if np.isfinite(f_new) and f_new <= f + 1e-4 * t * slope:
                break
            t *= 0.5
            if t < 1e-12:
                return x
        s_, y_ = x_new - x, g_new - g
        if s_ @ y_ > 1e-12 * np.sqrt((s_ @ s_) * (y_ @ y_)):
            S.append(s_)
            Y.append(y_)
            if len(S) > memory:
                S.pop(0)
                Y.pop(0)
        small = small + 1 if f - f_new <= tol * max(1.0, abs(f)) else 0
        x, f, g = x_new, f_new, g_new
        if small >= 3 or np.max(np.abs(g)) < 1e-9:
            break
    return x


def _softmax(theta):
    z = np.exp(theta - theta.max())
    return z / z.sum()


def _fit_penalised(L, weight, basis: _Basis, strength, params0, *, max_iter=400):
    """Maximise (1/W) Σ_i ω_i log Σ_k L_ik w_k − (λ/2) Σ_j Λ_j c_j², w = softmax(θ(μ, ln s, c)).

    c is preconditioned by √(1 + λΛ_j) so that every direction has unit-order curvature. Parameters in and out
    are (μ, ln s, c) in natural units.
    """
    from ._msd_kernels import mixture_density, row_weighted_sums

    W = weight.sum()
    u, B, lam = basis.u, basis.B, basis.penalty
    scale = 1.0 / np.sqrt(1.0 + strength * lam)
    L = np.ascontiguousarray(L, dtype=float)
    LT = np.ascontiguousarray(L.T)  # both layouts, so that both products run along contiguous rows
    s = np.empty(L.shape[0])
    gk_sum = np.empty(L.shape[1])

    def fun(x):
        mu, log_s, c = x[0], _clip_log_s(x[1]), x[2:] * scale
        inv_s2 = np.exp(-2 * log_s)
        th = -0.5 * (u - mu) ** 2 * inv_s2 + B @ c
        w = _softmax(th)
        # the two products with the tracks' kernel rows (most of the fit's time), compiled: one thread, one
        # order of the sums (threaded BLAS spends more time on a matrix of this size than it saves)
        mixture_density(LT, w, 1e-300, s)  # max(L @ w, 1e-300)
        gk = row_weighted_sums(L, weight / s, gk_sum) / W  # L.T @ (weight / s) / W
        f = -np.sum(weight * np.log(s)) / W + 0.5 * strength * np.sum(lam * c * c)
        gth = -w * (gk - 1.0)
        grad = np.empty_like(x)
        grad[0] = gth @ ((u - mu) * inv_s2)
        grad[1] = gth @ ((u - mu) ** 2 * inv_s2) if _LOG_S_RANGE[0] < x[1] < _LOG_S_RANGE[1] else 0.0
        grad[2:] = (B.T @ gth + strength * lam * c) * scale
        return f, grad

    x0 = np.concatenate([params0[:2], params0[2:] / scale])
    x = _lbfgs(fun, x0, max_iter=max_iter, tol=1e-5 / W)  # stop when the total log-likelihood gains < 1e-5
    return np.concatenate([x[:2], x[2:] * scale])


def _theta_of(basis: _Basis, params):
    return basis.theta(params[0], params[1], params[2:])


def _heldout_scores(L, row_max, weight, theta):
    from ._msd_kernels import mixture_density

    w = _softmax(theta)
    LT = np.ascontiguousarray(np.asarray(L, dtype=float).T)
    return weight * (np.log(mixture_density(LT, w, 1e-300, np.empty(LT.shape[1]))) + row_max)


def _lognormal_start(n_grid, tr: _Tracks, D_to_u, step):
    """Start from a log-normal (μ, ln s, c = 0): moments of ln size over tracks less the kernel's variance."""
    pos = tr.D > 0
    with np.errstate(invalid="ignore"):
        u = D_to_u(tr.D[pos])
    ok = np.isfinite(u)
    u, k, w = u[ok], tr.n[pos][ok] * 1.0, tr.weight[pos][ok]  # k: Gamma shape for d = 2, Var ln D̂ = ψ'(k)
    mu = float(np.average(u, weights=w))
    var = float(np.average((u - mu) ** 2, weights=w) - np.average(special.polygamma(1, k)))
    var = max(var, (2 * step) ** 2)
    return np.concatenate([[mu, 0.5 * np.log(var)], np.zeros(n_grid - 3)])


def choose_and_fit(L, row_max, weight, basis: _Basis, params0, *, rng=0):
    """Choose the penalty strength by cross-validation and fit all tracks with it.

    Returns θ on the grid and a dict describing the choice (strength, rule, cross-validated log-likelihoods).
    """
    n_all = L.shape[0]
    method: dict = {}
    if n_all >= _MIN_TRACKS_CV:
        g = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
        cv = slice(None)
        if n_all > _MAX_TRACKS_CV:
            cv = np.sort(g.choice(n_all, _MAX_TRACKS_CV, replace=False))
        Lc, rc, wc = L[cv], row_max[cv], weight[cv]
        n_used = Lc.shape[0]
        fold = g.permutation(n_used) % _N_FOLDS
        fold_params = [params0] * _N_FOLDS
        strengths: list[float] = []
        rows: list[np.ndarray] = []
        lam = _STRENGTH_MAX
        while True:  # strongest first, warm starts towards weaker penalties
            row = np.empty(n_used)
            for f in range(_N_FOLDS):
                train, test = fold != f, fold == f
                fold_params[f] = _fit_penalised(Lc[train], wc[train], basis, lam, fold_params[f])
                row[test] = _heldout_scores(Lc[test], rc[test], wc[test], _theta_of(basis, fold_params[f]))
            strengths.append(lam)
            rows.append(row)
            lam /= 10.0
            if lam < _STRENGTH_MIN * (1 - 1e-9):
                # go on only while the weakest penalty is still clearly the best (sharp, separate modes)
                gain = rows[-1] - rows[-2]
                if not (lam >= _STRENGTH_FLOOR * (1 - 1e-9) and gain.sum() > np.sqrt(n_used * np.var(gain))):
                    break
        scores = np.array(rows)
        scores = np.where(np.isfinite(scores), scores, -1e12)
        total = scores.sum(axis=1)
        best = int(np.argmax(total))
        diff_se = np.sqrt(n_used * np.var(scores - scores[best], axis=1))
        chosen = int(np.min(np.flatnonzero(total >= total[best] - diff_se)))
        rule = f"{_N_FOLDS}-fold cross-validation, one-SE rule"
        if n_all > _MAX_TRACKS_CV:
            rule += f" (on {_MAX_TRACKS_CV} random tracks)"
        method["cv_log_likelihood"] = [float(v) for v in total]
        method["cv_strengths"] = strengths
    else:
        strengths, chosen = [_STRENGTH_MAX], 0
        rule = f"best log-normal (fewer than {_MIN_TRACKS_CV} tracks)"
    params = params0
    for lam in strengths[: chosen + 1]:
        params = _fit_penalised(L, weight, basis, lam, params)
    method.update({"regularization_strength": float(strengths[chosen]), "regularization_rule": rule})
    return _theta_of(basis, params), method


# ----------------------------------------------------------------------------------------------------------
# Wrong joins: where a track changes from one particle size to another
# ----------------------------------------------------------------------------------------------------------
def _step_log_densities(y, s2, D_states, dt, R, n_dims, limits: StepLimits):
    """Log density of single steps' y (rows: steps or tracks × steps broadcast) under each state D_k."""
    a = 2 * D_states[None, :] * dt * (1 - 2 * R) + 2 * s2[:, None]
    mean, var = _step_moments(a, n_dims, limits)
    k = mean**2 / var
    theta = var / mean
    return k, theta, -k * np.log(theta) - special.gammaln(k)


def _switch_runs(y, track_index, w_states):
    """Return the set-up shared by both size-switch paths.

    That is: steps as floats, the output mask, the switch weights (floored at 2 % spread evenly), and each
    track's first step, number of steps and index.
    """
    y = np.asarray(y, dtype=float)
    track_index = np.asarray(track_index)
    w = np.asarray(w_states, dtype=float)
    w = 0.98 * w / w.sum() + 0.02 / w.size
    starts = np.flatnonzero(np.r_[True, track_index[1:] != track_index[:-1]]) if y.size else np.zeros(0, int)
    lengths = np.diff(np.r_[starts, y.size])
    return y, np.zeros(y.size, dtype=bool), w, starts, lengths, track_index[starts]


def switch_points(y, track_index, s2_track, D_states, w_states, *, dt, R, n_dims, limits, p_switch):
    """Find the steps at which the most probable state path of each track jumps to another particle size.

    Compiled version of :func:`_switch_points_numpy` (same model, recursion and result; see there).
    """
    from . import _msd_kernels as kern

    y, out, w, starts, lengths, owners = _switch_runs(y, track_index, w_states)
    if y.size == 0:
        return out
    k, theta, c = _step_log_densities(None, np.asarray(s2_track, float)[owners], np.asarray(D_states, float),
                                      dt, R, n_dims, limits)
    kern.viterbi_switches(
        y, starts.astype(np.int64), lengths.astype(np.int64), np.arange(starts.size, dtype=np.int64),
        np.ascontiguousarray(k, dtype=float), np.ascontiguousarray(theta, dtype=float),
        np.ascontiguousarray(c, dtype=float), np.log(w), float(np.log(p_switch)), float(np.log1p(-p_switch)),
        out,
    )
    return out


def _switch_points_numpy(
    y, track_index, s2_track, D_states, w_states, *, dt, R, n_dims, limits, p_switch, block=256
):
    """Find the steps at which the most probable state path of each track jumps to another particle size.

    Hidden-state model of a linker's output: each step belongs to one particle (state = its D on
    ``D_states``); at every step the track may, with probability ``p_switch``, continue with a different
    particle whose D is drawn from ``w_states`` (a wrong join). Steps are independent given the state, each
    with the one-step law of :func:`_step_moments` (the MA(1) correlation of neighbouring steps is ignored).
    The most probable path is found by the Viterbi algorithm (Viterbi 1967; Rabiner 1989, Proc. IEEE 77:257);
    the rank-one switch term makes each step O(K).

    Parameters
    ----------
    y : array
        Per-axis mean squared length of each valid step, grouped by track in order.
    track_index : array of int
        Track of each step (0 … n_tracks − 1), non-decreasing.
    s2_track : array
        σ² per track.

    Returns
    -------
    bool array, one per step: True where a new state (a new particle) starts at this step.
    """
    y, out, w, starts, lengths, owners = _switch_runs(y, track_index, w_states)
    if y.size == 0:
        return out
    log_w = np.log(w)
    log_p, log_q = np.log(p_switch), np.log1p(-p_switch)
    order = np.argsort(lengths, kind="stable")
    order = order[lengths[order] >= 2]
    for b0 in range(0, order.size, block):
        sel = order[b0 : b0 + block]
        n_i = lengths[sel]
        L = int(n_i.max())
        idx = starts[sel][:, None] + np.arange(L)[None, :]
        valid = np.arange(L)[None, :] < n_i[:, None]
        Y = np.where(valid, y[np.minimum(idx, y.size - 1)], 1.0)
        k, theta, c = _step_log_densities(Y[:, 0], s2_track[owners[sel]], D_states, dt, R, n_dims, limits)
        logy = np.log(np.maximum(Y, 1e-300))
        delta = log_w[None, :] + (k - 1) * logy[:, :1] - Y[:, :1] / theta + c
        switched = np.zeros((L, sel.size, D_states.size), dtype=bool)
        prev_best = np.zeros((L, sel.size), dtype=np.int64)
        for j in range(1, L):
            act = valid[:, j]
            pb = np.argmax(delta, axis=1)
            best = delta[np.arange(sel.size), pb]
            stay = delta + log_q
            jump = (log_p + best)[:, None] + log_w[None, :]
            choose = jump > stay
            new = (k - 1) * logy[:, j : j + 1] - Y[:, j : j + 1] / theta + c + np.where(choose, jump, stay)
            delta = np.where(act[:, None], new, delta)
            switched[j] = choose & act[:, None]
            prev_best[j] = pb
        state = np.argmax(delta, axis=1)
        rows = np.arange(sel.size)
        cut = np.zeros((sel.size, L), dtype=bool)
        for j in range(L - 1, 0, -1):
            act = valid[:, j]
            sw = act & switched[j, rows, state]
            cut[:, j] = sw
            state = np.where(sw, prev_best[j], state)
        out[idx[valid]] = cut[valid]
    return out
