"""Motion classes per track and sample-level motion flags.

Per track, five models of the steps are fitted by likelihood (see :mod:`msdkit.motion_models`): immobile
(localisation noise only), Brownian with localisation offset and motion blur, power law (fractional Brownian
motion) with offset, confined in a box (reflecting walls, plateau L²/6 per axis) and diffusion plus a constant
velocity. The likelihood of the steps accounts for the correlation of the MSD points, which a least-squares
fit of the time-averaged MSD ignores. The model with the highest penalised log-likelihood gives the class
(penalties are χ² quantiles, see :data:`DEFAULT_PENALTIES`); the interval of alpha comes from the profile
likelihood, and a track is anomalous exactly when that interval excludes 1 and the power law beats the
other models.

Per sample, :func:`sample_motion` fits one power-law-plus-noise spectrum (blur included) to the steps of all
tracks at once for the ensemble alpha, with a bootstrap interval over tracks, and compares time-averaged and
ensemble-averaged MSDs, the spread of per-track MSDs with what finite tracks explain, and the shape of the
displacement distribution, to set plain-word flags.

References
----------
R. Metzler, J.-H. Jeon, A. G. Cherstvy & E. Barkai, Phys. Chem. Chem. Phys. 16, 24128 (2014),
doi:10.1039/C4CP03465A (ergodicity breaking, time vs ensemble averages).
H. Qian, M. P. Sheetz & E. L. Elson, Biophys. J. 60, 910 (1991), doi:10.1016/S0006-3495(91)82125-7.
M. J. Saxton & K. Jacobson, Annu. Rev. Biophys. Biomol. Struct. 26, 373 (1997).
A. Rahman, Phys. Rev. 136, A405 (1964) (non-Gaussian parameter).
B. Efron & R. J. Tibshirani, An Introduction to the Bootstrap (Chapman & Hall, 1993).
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import special

from ._threads import Beside
from .errors import InputError, expected_got
from .estimators.increments import _axis_power
from .motion_models import ALPHA_GRID, fit_step_models
from .schema import MOTION_CLASSES, check_track_table, position_columns

__all__ = ["classify_tracks", "sample_motion", "SampleMotion", "CLASS_COLUMNS"]

#: Columns of the per-track table returned by :func:`classify_tracks`.
CLASS_COLUMNS: dict[str, str] = {
    "track": "int64",
    "n_points": "int64",
    "motion_class": "object",
    "class_confidence": "float64",
    "alpha": "float64",
    "alpha_ci95_lo": "float64",
    "alpha_ci95_hi": "float64",
    "alpha_posterior": "float64",
    "alpha_posterior_ci95_lo": "float64",
    "alpha_posterior_ci95_hi": "float64",
    "D_um2_s": "float64",
    "K_um2_s_alpha": "float64",
    "sigma_um": "float64",
    "confinement_um": "float64",
    "confinement_time_s": "float64",
    "speed_um_s": "float64",
    "loglik_gain_mobile": "float64",
    "loglik_gain_anomalous": "float64",
    "loglik_gain_confined": "float64",
    "loglik_gain_directed": "float64",
    "step_corr_lag1": "float64",
    "non_gaussian": "float64",
    "straightness": "float64",
    "gyration_asymmetry": "float64",
}

#: Log-likelihood penalties of the models relative to the Brownian one. An alternative must raise twice the
#: log-likelihood above the Brownian model's by twice its penalty: anomalous (one more parameter) by the 95 %
#: point of χ²₁ (3.84, so a track is called anomalous exactly when its 95 % alpha interval excludes 1),
#: confined (one more) by the 99 % point of χ²₁ (6.63), directed (two more) by the 99 % point of χ²₂ (9.21);
#: the immobile model (one parameter fewer) wins unless the Brownian one beats it by 6.63. Per-track false
#: alarms on Brownian tracks are checked in tests/test_classify.py and benchmarks/classify.py.
DEFAULT_PENALTIES = {
    "immobile": -0.5 * float(special.chdtri(1, 1.0 - 0.99)),
    "normal": 0.0,
    "anomalous": 0.5 * float(special.chdtri(1, 1.0 - 0.95)),
    "confined": 0.5 * float(special.chdtri(1, 1.0 - 0.99)),
    "directed": 0.5 * float(special.chdtri(2, 1.0 - 0.99)),
}

_MODEL_PARAMS = {"immobile": 1, "normal": 2, "anomalous": 3, "confined": 3, "directed": 4}


# ------------------------------------------------------------------------------------------ track data
@dataclass
class _TrackArrays:
    ids: np.ndarray  # (T,)
    n_points: np.ndarray  # observed positions per track
    positions: list  # per track (n_frames_span, d) on the frame grid, gaps filled by linear interpolation
    xyz: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))  # observed rows in (track, frame) order
    starts: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))  # first row of a track in xyz
    gapped: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))  # track has missed frames
    gap_frames: dict = field(default_factory=dict)  # observed frames of each gapped track (by track index)


def _stack_positions(positions: list, xyz, starts, gapped, idx: np.ndarray, n_pts: int) -> np.ndarray:
    """Positions of the tracks ``idx`` (all ``n_pts`` long) as one (g, n_pts, d) array.

    When the tracks are ungapped and stored back to back in ``xyz`` this is a reshaped view of it (the same
    numbers as stacking the per-track arrays, without the copy); otherwise the per-track arrays are stacked.
    """
    if idx.size and xyz is not None and not gapped[idx].any():
        s = starts[idx]
        if np.all(np.diff(s) == n_pts) and s[0] + n_pts * idx.size <= xyz.shape[0]:
            return xyz[s[0] : s[0] + n_pts * idx.size].reshape(idx.size, n_pts, xyz.shape[1])
    return np.stack([positions[i] for i in idx])


def _check_tracks(tracks, frame_interval_s, exposure_s):
    check_track_table(tracks, frame_interval_s)
    exposure = frame_interval_s if exposure_s is None else float(exposure_s)
    if not 0 <= exposure <= frame_interval_s * (1 + 1e-9):
        raise InputError(
            expected_got(
                "exposure_s",
                f"between 0 and frame_interval_s={frame_interval_s}",
                exposure_s,
                "The exposure cannot exceed the frame interval.",
            )
        )
    return min(exposure, frame_interval_s)


def _track_arrays(tracks: pd.DataFrame) -> _TrackArrays:
    cols = position_columns(tracks)
    t = tracks["track"].to_numpy()
    f = tracks["frame"].to_numpy().astype(np.int64)
    xyz = np.column_stack([tracks[c].to_numpy(float) for c in cols])
    ok = np.isfinite(xyz[:, 0])  # rows with all coordinates finite (one axis at a time: no (n, d) temporary)
    for j in range(1, xyz.shape[1]):
        ok &= np.isfinite(xyz[:, j])
    if not ok.all():
        t, f, xyz = t[ok], f[ok], xyz[ok]
    if t.dtype.kind in "iu" and t.size >= 2:  # sorted by track, frames rising in a track: one compiled scan
        from ._msd_kernels import scan_order

        in_order = scan_order(t, f)[0] == 0
    else:
        in_order = t.size < 2 or bool(np.all(t[1:] >= t[:-1]) and np.all((t[1:] > t[:-1]) | (f[1:] > f[:-1])))
    if not in_order:  # rows already in (track, frame) order with unique pairs need no sort
        order = np.lexsort((f, t))
        t, f, xyz = t[order], f[order], xyz[order]
    if t.size == 0:
        return _TrackArrays(np.zeros(0, np.int64), np.zeros(0, np.int64), [])
    dup = (t[1:] == t[:-1]) & (f[1:] == f[:-1])
    if dup.any():
        i = int(np.flatnonzero(dup)[0])
        raise InputError(
            expected_got(
                "tracks: (track, frame) pairs",
                "unique",
                f"track {t[i]} has frame {f[i]} twice",
                "Keep one position per track and frame.",
            )
        )
    start = np.flatnonzero(np.concatenate([[True], t[1:] != t[:-1]]))
    stop = np.append(start[1:], t.size)
    gapped = (f[stop - 1] - f[start] + 1) != (stop - start)
    positions = [xyz[a:b] for a, b in zip(start.tolist(), stop.tolist(), strict=True)]
    gap_frames = {}
    for i in np.flatnonzero(gapped):
        fr = f[start[i] : stop[i]]
        gap_frames[int(i)] = fr.copy()
        p = positions[i]
        grid = np.arange(fr[0], fr[-1] + 1)
        positions[i] = np.column_stack([np.interp(grid, fr, p[:, j]) for j in range(p.shape[1])])
    return _TrackArrays(
        t[start].astype(np.int64),
        (stop - start).astype(np.int64),
        positions,
        xyz,
        start.astype(np.int64),
        gapped,
        gap_frames,
    )


# ------------------------------------------------------------------------------------- step statistics
def _step_statistics(pos: np.ndarray) -> tuple[float, float, float, float]:
    """Lag-1 step correlation, non-Gaussian parameter, straightness and gyration asymmetry of one track."""
    d = np.diff(pos, axis=0)
    if d.shape[0] < 3:
        return (np.nan,) * 4
    dc = d - d.mean(0)
    num = float(np.sum(dc[1:] * dc[:-1]))
    den = float(np.sum(dc * dc))
    corr = num / den if den > 0 else np.nan
    r2 = np.sum(d * d, axis=1)
    m2 = r2.mean()
    nd = d.shape[1]
    # α2 = ⟨r⁴⟩ / ((1 + 2/d) ⟨r²⟩²) − 1 (Rahman 1964): 0 for Gaussian steps
    ng = float(np.mean(r2 * r2) / ((1.0 + 2.0 / nd) * m2 * m2) - 1.0) if m2 > 0 else np.nan
    path = float(np.sum(np.sqrt(r2)))
    straight = float(np.linalg.norm(pos[-1] - pos[0]) / path) if path > 0 else np.nan
    c = np.cov(pos.T)
    ev = np.linalg.eigvalsh(c) if np.all(np.isfinite(c)) else np.array([np.nan, np.nan])
    asym = float(((ev[-1] - ev[0]) / (ev[-1] + ev[0])) ** 2) if ev.sum() > 0 else np.nan
    return corr, ng, straight, asym


def _step_statistics_group(X: np.ndarray) -> np.ndarray:
    """:func:`_step_statistics` of equal-length tracks X (g, n, d) at once; returns (g, 4)."""
    g, n, nd = X.shape
    out = np.full((g, 4), np.nan)
    if g == 0 or n - 1 < 3:
        return out
    if nd == 2 and X.dtype == np.float64:  # one compiled pass per track, same formulas (tested against numpy)
        from ._msd_kernels import planar_step_statistics

        planar_step_statistics(X, out)
        return out
    d = np.diff(X, axis=1)
    # means over the track as products with a vector of ones (a matrix product is much faster than a
    # reduction along the middle axis; same numbers up to the order of the sum)
    dc = d - (np.ones(n - 1) @ d)[:, None, :] / (n - 1)
    num = np.einsum("gij,gij->g", dc[:, 1:], dc[:, :-1])
    den = np.einsum("gij,gij->g", dc, dc)
    r2 = np.einsum("gij,gij->gi", d, d)
    m2 = r2 @ np.full(n - 1, 1.0 / (n - 1))
    m4 = np.einsum("gi,gi->g", r2, r2) / r2.shape[1]
    path = np.sqrt(r2) @ np.ones(n - 1)
    end = np.sqrt(np.einsum("gj,gj->g", X[:, -1] - X[:, 0], X[:, -1] - X[:, 0]))
    Xc = X - (np.ones(n) @ X)[:, None, :] / n
    c = (Xc.transpose(0, 2, 1) @ Xc) / (n - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        if nd == 2:
            # 2 x 2 covariance [[a, b], [b, e]]: (λ₁ − λ₀)² / (λ₁ + λ₀)² = ((a − e)² + 4b²) / (a + e)²
            a_, b_, e_ = c[:, 0, 0], c[:, 0, 1], c[:, 1, 1]
            evs = a_ + e_
            asym = ((a_ - e_) ** 2 + 4.0 * b_ * b_) / (evs * evs)
        else:
            fin = np.all(np.isfinite(c), axis=(1, 2))
            ev = np.full((g, nd), np.nan)
            if fin.any():
                ev[fin] = np.linalg.eigvalsh(c[fin])
            evs = ev.sum(1)
            asym = ((ev[:, -1] - ev[:, 0]) / (ev[:, -1] + ev[:, 0])) ** 2
        out[:, 0] = np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)
        # α2 = ⟨r⁴⟩ / ((1 + 2/d) ⟨r²⟩²) − 1 (Rahman 1964): 0 for Gaussian steps
        out[:, 1] = np.where(m2 > 0, m4 / ((1.0 + 2.0 / nd) * m2 * m2) - 1.0, np.nan)
        out[:, 2] = np.where(path > 0, end / np.where(path > 0, path, 1.0), np.nan)
        out[:, 3] = np.where(evs > 0, asym, np.nan)
    return out


def _step_statistics_all(positions: list, xyz=None, starts=None, gapped=None) -> np.ndarray:
    """:func:`_step_statistics` of every track (T, 4), computed per group of equal-length tracks.

    ``xyz, starts, gapped`` (from :func:`_track_arrays`) let groups of ungapped tracks stored back to back be
    read without copying; groups go in cache-sized blocks of tracks (each track's numbers are its own).
    """
    T = len(positions)
    out = np.full((T, 4), np.nan)
    if T == 0:
        return out
    span = np.array([p.shape[0] for p in positions], dtype=np.int64)
    d = positions[0].shape[1]
    for n_pts in np.unique(span):
        idx = np.flatnonzero(span == n_pts)
        step = max(1, 32768 // (int(n_pts) * d))
        for a in range(0, idx.size, step):
            sub = idx[a : a + step]
            X = _stack_positions(positions, xyz, starts, gapped, sub, int(n_pts))
            out[sub] = _step_statistics_group(X)
    return out


# -------------------------------------------------------------------------------------- classification
@dataclass(frozen=True)
class _Fits:
    """Per-track fit results in physical units, in the order of ``ids``."""

    ids: np.ndarray
    n_points: np.ndarray
    usable: np.ndarray
    ll: dict
    alpha: np.ndarray
    alpha_lo: np.ndarray
    alpha_hi: np.ndarray
    alpha_profile: np.ndarray
    D_um2_s: np.ndarray
    K_um2_s_alpha: np.ndarray
    sigma_um: np.ndarray
    conf_L_um: np.ndarray
    conf_tau_s: np.ndarray
    conf_noise_um2: np.ndarray
    speed_um_s: np.ndarray
    n_axes: int
    positions: list = field(repr=False)
    xyz: np.ndarray = field(repr=False, default=None)
    starts: np.ndarray = field(repr=False, default=None)
    gapped: np.ndarray = field(repr=False, default=None)
    gap_frames: dict = field(repr=False, default_factory=dict)
    #: per track length (positions): (indices of the fitted tracks, their tapered step periodograms)
    periodograms: dict = field(repr=False, default_factory=dict)


_FIT_CACHE: dict = {}
_FIT_CACHE_LOCK = threading.Lock()


_CHECK_BLOCK = 4096
_CHECK_W_IN = 1.0 + 0.5 * np.sin(np.arange(_CHECK_BLOCK) * 0.7548776662466927)


def _column_check(a: np.ndarray) -> str:
    """Cheap content check of one column: its sum and a position-weighted sum (weights differ per row).

    Changing a value, or moving values to other rows, changes the weighted sum except by an unlikely
    cancellation; a column with non-finite values (whose sums say nothing) is hashed in full instead.
    """
    try:
        v = np.asarray(a)
        if v.dtype not in (np.int64, np.int32, np.float64, np.float32):  # the compiled sums take these four
            v = v.astype(np.float64)
        v = np.ascontiguousarray(v.ravel())
    except (TypeError, ValueError):  # not numbers: hash the pandas hashes of the values
        import hashlib

        hv = pd.util.hash_array(np.asarray(a))
        return f"{a.size}:{a.dtype}:" + hashlib.blake2b(hv.tobytes(), digest_size=16).hexdigest()
    n = v.size
    from ._msd_kernels import column_sums

    sums = tuple(float(x) for x in column_sums(v, _CHECK_W_IN, 0.5698402909980532))  # one compiled pass
    if np.all(np.isfinite(sums)):
        return f"{n}:{a.dtype}:" + ",".join(x.hex() for x in sums)
    import hashlib

    return f"{n}:{a.dtype}:" + hashlib.blake2b(np.ascontiguousarray(a).tobytes(), digest_size=16).hexdigest()


def _fingerprint(tracks: pd.DataFrame, *extra) -> str:
    """Key of the fit cache: row count, and per column the dtype and :func:`_column_check`, plus ``extra``."""
    parts = [str(len(tracks))]
    for c in ("track", "frame", "x_um", "y_um", "z_um"):
        if c in tracks.columns:
            parts.append(f"{c}={_column_check(tracks[c].to_numpy())}")
    parts.append(repr(extra))
    return "|".join(parts)


def _fit_all(tracks: pd.DataFrame, frame_interval_s: float, exposure_s: float, min_points: int,
             stop=None) -> _Fits:
    """Fit all models to all tracks (the last two results are kept: sample_motion reuses classify's fits).

    ``stop`` (a threading.Event): checked between the heavy parts; when set, motion_models.Stopped is raised
    and nothing is kept.
    """
    key = _fingerprint(tracks, float(frame_interval_s), float(exposure_s), int(min_points))
    if key in _FIT_CACHE:
        return _FIT_CACHE[key]
    fits = _fit_all_uncached(tracks, frame_interval_s, exposure_s, min_points, stop)
    with _FIT_CACHE_LOCK:  # fits may be prepared in another thread (prepare_step_fits)
        while len(_FIT_CACHE) >= 2:
            _FIT_CACHE.pop(next(iter(_FIT_CACHE)))
        _FIT_CACHE[key] = fits
    return fits


def prepare_step_fits(tracks: pd.DataFrame, *, frame_interval_s: float, exposure_s: float | None = None,
                      min_points: int = 10, stop=None) -> bool:
    """Fit the step models of :func:`classify_tracks` and :func:`sample_motion` ahead of their call.

    The fits depend on the tracks only, so the pipeline computes them in a second thread while the
    per-track D and alpha are fitted; the next :func:`classify_tracks` (or :func:`sample_motion`) with the
    same tracks, times and ``min_points`` takes them from the cache (the last two tables are kept) instead
    of fitting again. The results are the same numbers either way.

    ``stop`` (a threading.Event) is checked between the heavy parts: once it is set the fitting stops, nothing
    is kept and False is returned (True when the fits were made or found).
    """
    from .motion_models import Stopped

    exposure = _check_tracks(tracks, frame_interval_s, exposure_s)
    try:
        _fit_all(tracks, frame_interval_s, exposure, min_points, stop)
    except Stopped:
        return False
    return True


def _fit_all_uncached(
    tracks: pd.DataFrame, frame_interval_s: float, exposure_s: float, min_points: int, stop=None
) -> _Fits:
    from .motion_models import _check as check_stop

    arr = _track_arrays(tracks)
    T = arr.ids.size
    dt = float(frame_interval_s)
    e = float(exposure_s) / dt
    n_axes = 2 if not arr.positions else arr.positions[0].shape[1]
    nan = lambda: np.full(T, np.nan)  # noqa: E731
    out = {k: nan() for k in ("alpha", "alpha_lo", "alpha_hi", "D", "K", "sigma", "L", "tau", "cnoise", "v")}
    ll = {k: nan() for k in _MODEL_PARAMS}
    profile = np.full((T, ALPHA_GRID.size), np.nan)
    span = np.array([p.shape[0] for p in arr.positions], dtype=np.int64)
    usable = (arr.n_points >= max(int(min_points), 4)) & (span >= 4)
    periodograms: dict = {}
    for n_pts in np.unique(span[usable]):
        idx = np.flatnonzero(usable & (span == n_pts))
        check_stop(stop)
        X = _stack_positions(arr.positions, arr.xyz, arr.starts, arr.gapped, idx, int(n_pts))
        steps = np.diff(X, axis=1)
        f = fit_step_models(steps, exposure_ratio=e, stop=stop)
        periodograms[int(n_pts)] = (idx, f.periodogram)
        Ns = steps.shape[1]
        ll["immobile"][idx] = f.ll_immobile
        ll["normal"][idx] = f.ll_brownian
        ll["anomalous"][idx] = f.ll_fbm
        ll["confined"][idx] = f.ll_confined
        ll["directed"][idx] = f.ll_directed
        profile[idx] = f.alpha_profile
        out["alpha"][idx] = f.alpha
        out["alpha_lo"][idx] = f.alpha_lo
        out["alpha_hi"][idx] = f.alpha_hi
        out["D"][idx] = f.brown_scale / (2.0 * dt)
        out["K"][idx] = f.fbm_scale / (2.0 * dt**f.alpha)
        out["sigma"][idx] = np.sqrt(np.clip(f.brown_noise, 0.0, None) / 2.0)
        L2 = 6.0 * f.conf_plateau
        out["L"][idx] = np.sqrt(L2)
        out["tau"][idx] = f.conf_tau * dt
        out["cnoise"][idx] = f.conf_noise / 2.0
        var_end = f.dir_scale * (Ns - e / 3.0) + f.dir_noise  # per-axis variance of the end-to-end step
        excess = np.sum(f.end_to_end**2, axis=1) - steps.shape[2] * var_end
        out["v"][idx] = np.sqrt(np.clip(excess, 0.0, None)) / (Ns * dt)
    return _Fits(
        ids=arr.ids,
        n_points=arr.n_points,
        usable=usable,
        ll=ll,
        alpha=out["alpha"],
        alpha_lo=out["alpha_lo"],
        alpha_hi=out["alpha_hi"],
        alpha_profile=profile,
        D_um2_s=out["D"],
        K_um2_s_alpha=out["K"],
        sigma_um=out["sigma"],
        conf_L_um=out["L"],
        conf_tau_s=out["tau"],
        conf_noise_um2=out["cnoise"],
        speed_um_s=out["v"],
        n_axes=n_axes,
        positions=arr.positions,
        xyz=arr.xyz,
        starts=arr.starts,
        gapped=arr.gapped,
        gap_frames=arr.gap_frames,
        periodograms=periodograms,
    )


def _choose(
    fits: _Fits,
    *,
    frame_interval_s: float,
    penalties: dict,
    sigma_um: float | None,
    max_alpha_ci_width: float,
):
    names = list(_MODEL_PARAMS)
    ll = np.column_stack([fits.ll[m] for m in names])
    pen = np.array([penalties[m] for m in names], float)
    score = ll - ll[:, [1]] - pen[None, :]
    T = ll.shape[0]
    best = np.full(T, -1)
    conf = np.full(T, np.nan)
    ok = fits.usable & np.all(np.isfinite(score), axis=1)
    if ok.any():
        s = score[ok]
        best[ok] = np.argmax(s, axis=1)
        z = np.exp(s - s.max(axis=1, keepdims=True))
        conf[ok] = z[np.arange(s.shape[0]), best[ok]] / z.sum(axis=1)
    labels = np.full(T, "undetermined", dtype=object)
    model = np.array(names + ["none"], dtype=object)[best]
    labels[model == "immobile"] = "immobile"
    labels[model == "normal"] = "normal"
    labels[model == "directed"] = "directed"
    an = model == "anomalous"
    labels[an & (fits.alpha < 1.0)] = "subdiffusive"
    labels[an & (fits.alpha >= 1.0)] = "superdiffusive"
    cf = model == "confined"
    labels[cf] = "confined"
    # a cage crossed within one frame cannot be told from localisation noise unless the noise is known
    fast = cf & (fits.conf_tau_s < frame_interval_s)
    if sigma_um is not None and np.isfinite(sigma_um) and sigma_um >= 0:
        cage_var = fits.conf_L_um**2 / 12.0 + fits.conf_noise_um2  # per-axis position variance
        tiny = cage_var < 3.0 * float(sigma_um) ** 2
        labels[fast & tiny] = "immobile"
        labels[cf & ~fast & tiny] = "immobile"
    else:
        labels[fast] = "immobile"
    # Brownian not rejected but alpha hardly constrained: too short to tell
    vague = (labels == "normal") & ((fits.alpha_hi - fits.alpha_lo) > max_alpha_ci_width)
    labels[vague] = "undetermined"
    return labels, conf, score


def _alpha_posterior(
    profiles: np.ndarray, usable: np.ndarray, n_iter: int = 50
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Posterior mean and central 95 % interval of each track's alpha under the distribution of alpha over all
    tracks (empirical Bayes).

    The distribution is a discrete one on the alpha grid, estimated from all usable tracks' profile
    likelihoods by expectation-maximisation towards the nonparametric maximum-likelihood mixing distribution,
    started from a uniform one and stopped after ``n_iter`` steps (early stopping keeps it smooth); each
    track's alpha is then the mean of its profile likelihood times that distribution. A short track's
    own likelihood is flat, so it borrows from the tracks like it; a long track keeps its own value; a
    sample of several kinds of motion keeps several modes.

    References
    ----------
    H. Robbins, Proc. Third Berkeley Symp. Math. Stat. Prob. 1, 157 (1956) (empirical Bayes).
    N. Laird, J. Am. Stat. Assoc. 73, 805 (1978) (nonparametric maximum likelihood of a mixing distribution
    by EM).
    B. Efron, Stat. Sci. 34, 177 (2019) (g-modelling).
    """
    out = np.full(profiles.shape[0], np.nan)
    lo, hi = out.copy(), out.copy()
    ok = usable & np.all(np.isfinite(profiles), axis=1)
    if not ok.any():
        return out, lo, hi
    L = np.exp(profiles[ok] - profiles[ok].max(axis=1, keepdims=True))  # (n, A), each row's max is 1
    prior = np.full(ALPHA_GRID.size, 1.0 / ALPHA_GRID.size)
    from ._msd_kernels import em_mixing_weights

    # EM steps towards the mixing weights, compiled: numpy's operations in numpy's order (tested against the
    # plain loop in tests/test_kernels.py), without (n, A) temporaries; L is float64 and C-ordered (np.exp)
    prior = em_mixing_weights(np.ascontiguousarray(L, dtype=np.float64), prior, int(n_iter), 1e-7)
    post = L * np.maximum(prior, 1e-300)
    post /= post.sum(axis=1, keepdims=True)
    out[ok] = post @ ALPHA_GRID
    # interval: 2.5 and 97.5 % points of the posterior, linear between grid points of its cumulative sum
    cdf = np.cumsum(post, axis=1)
    for q, dest in ((0.025, lo), (0.975, hi)):
        k = np.minimum((cdf < q).sum(axis=1), ALPHA_GRID.size - 1)
        c0 = np.where(k > 0, cdf[np.arange(k.size), np.maximum(k - 1, 0)], 0.0)
        c1 = cdf[np.arange(k.size), k]
        a0 = np.where(k > 0, ALPHA_GRID[np.maximum(k - 1, 0)], ALPHA_GRID[0])
        frac = np.clip((q - c0) / np.maximum(c1 - c0, 1e-300), 0.0, 1.0)
        dest[ok] = np.where(k > 0, a0 + frac * (ALPHA_GRID[k] - a0), ALPHA_GRID[0])
    return out, lo, hi


def classify_tracks(
    tracks: pd.DataFrame,
    track_fits: pd.DataFrame | None = None,
    *,
    frame_interval_s: float,
    exposure_s: float | None = None,
    sigma_um: float | None = None,
    min_points: int = 10,
    penalties: dict | None = None,
    max_alpha_ci_width: float = 1.2,
) -> pd.DataFrame:
    """Assign a motion class to every track by comparing models of its steps.

    Parameters
    ----------
    tracks : DataFrame
        Columns ``track, frame, x_um, y_um`` (``z_um`` for 3D), µm. Missed frames are filled by linear
        interpolation for the model fits.
    track_fits : DataFrame, optional
        Per-track fits from :func:`msdkit.fit.fit_tracks`; accepted for the pipeline's convenience and not
        needed (this function fits its own models).
    frame_interval_s : float, s
    exposure_s : float, s, default=frame_interval_s
        Shutter-open time per frame (0 = instantaneous samples), for the motion-blur correction.
    sigma_um : float, µm, optional
        Known localisation SD per axis. Only used to tell a tiny cage from an immobile particle; every model
        fits its own noise level per track.
    min_points : int, default=10
        Shorter tracks are ``undetermined``.
    penalties : dict, optional
        Log-likelihood penalties of the models ``immobile, normal, anomalous, confined, directed`` relative
        to the Brownian one; see :data:`DEFAULT_PENALTIES`. Keys given replace the defaults.
    max_alpha_ci_width : float, default=1.2
        A track that the Brownian model explains but whose 95 % alpha interval is wider than this is
        ``undetermined`` (too short or too noisy to tell normal from anomalous motion).

    Returns
    -------
    DataFrame
        One row per track with the columns of :data:`CLASS_COLUMNS`: ``motion_class`` (one of
        :data:`msdkit.schema.MOTION_CLASSES`), ``class_confidence`` (weight of the chosen model among the
        five, from the penalised likelihoods), ``alpha`` with its 95 % profile-likelihood interval
        (``alpha_ci95_lo``, ``alpha_ci95_hi``), ``alpha_posterior`` (the track's alpha given the spread of
        alpha over all tracks of the table, see :func:`_alpha_posterior`; the better single value for short
        tracks), ``D_um2_s`` and ``sigma_um`` of the Brownian model,
        ``K_um2_s_alpha`` of the power-law model, ``confinement_um`` (box side L) and ``confinement_time_s``
        (L²/12D) for confined tracks, ``speed_um_s`` for directed tracks, the log-likelihood gains behind the
        choice (mobile over immobile, anomalous/confined/directed over Brownian) and step statistics (lag-1
        step correlation, non-Gaussian parameter of steps, straightness, gyration asymmetry).

    Notes
    -----
    Models and parameters: immobile (σ), Brownian (D, σ), power law (K, α, σ), confined (D, L, σ), directed
    (D, σ, v_x, v_y). Per-axis MSDs, with blur coefficient from the exposure: Brownian 2D(t − t_E/3) + 2σ²;
    power law 2Kt^α (exposure-averaged) + 2σ²; confined (L²/6)[1 − (96/π⁴) Σ_odd k⁻⁴ e^{−k²π²Dt/L²}]
    (exposure-averaged) + 2σ², plateau L²/6 per axis (Saxton & Jacobson 1997); directed: Brownian steps with
    mean v Δt, MSD 4Dt + v²t² in 2D. Each model's likelihood of the steps is the debiased Whittle likelihood
    (see :mod:`msdkit.motion_models`).

    References
    ----------
    A. M. Sykulski et al., Biometrika 106, 251 (2019), doi:10.1093/biomet/asy071.
    M. J. Saxton & K. Jacobson, Annu. Rev. Biophys. Biomol. Struct. 26, 373 (1997).

    Examples
    --------
    >>> from msdkit.simulate import fbm_positions, positions_to_tracks
    >>> pos = fbm_positions(5, 400, alpha=0.3, K_um2_s_alpha=0.1, frame_interval_s=0.05,
    ...                     localization_sd_um=0.01, rng=0)
    >>> out = classify_tracks(positions_to_tracks(pos, frame_interval_s=0.05), frame_interval_s=0.05,
    ...                       exposure_s=0.0)
    >>> list(out["motion_class"])
    ['subdiffusive', 'subdiffusive', 'subdiffusive', 'subdiffusive', 'subdiffusive']
    """
    exposure = _check_tracks(tracks, frame_interval_s, exposure_s)
    pens = dict(DEFAULT_PENALTIES)
    if penalties:
        unknown = set(penalties) - set(pens)
        if unknown:
            raise ValueError(
                expected_got(
                    "penalties keys",
                    f"some of {sorted(pens)}",
                    sorted(unknown),
                    "Name the models whose penalty you change.",
                )
            )
        pens.update({k: float(v) for k, v in penalties.items()})
    fits = _fit_all(tracks, frame_interval_s, exposure, min_points)
    labels, conf, score = _choose(
        fits,
        frame_interval_s=frame_interval_s,
        penalties=pens,
        sigma_um=sigma_um,
        max_alpha_ci_width=max_alpha_ci_width,
    )
    T = fits.ids.size
    alpha_post, alpha_post_lo, alpha_post_hi = _alpha_posterior(fits.alpha_profile, fits.usable)
    stats_ = (
        _step_statistics_all(fits.positions, fits.xyz, fits.starts, fits.gapped) if T else np.zeros((0, 4))
    )
    is_conf = labels == "confined"
    is_dir = labels == "directed"
    ll = fits.ll
    out = pd.DataFrame(
        {
            "track": fits.ids,
            "n_points": fits.n_points,
            "motion_class": labels,
            "class_confidence": conf,
            "alpha": fits.alpha,
            "alpha_ci95_lo": fits.alpha_lo,
            "alpha_ci95_hi": fits.alpha_hi,
            "alpha_posterior": alpha_post,
            "alpha_posterior_ci95_lo": alpha_post_lo,
            "alpha_posterior_ci95_hi": alpha_post_hi,
            "D_um2_s": fits.D_um2_s,
            "K_um2_s_alpha": fits.K_um2_s_alpha,
            "sigma_um": fits.sigma_um,
            "confinement_um": np.where(is_conf, fits.conf_L_um, np.nan),
            "confinement_time_s": np.where(is_conf, fits.conf_tau_s, np.nan),
            "speed_um_s": np.where(is_dir, fits.speed_um_s, np.nan),
            "loglik_gain_mobile": np.fmax(np.fmax(ll["normal"], ll["anomalous"]), ll["confined"])
            - ll["immobile"],
            "loglik_gain_anomalous": ll["anomalous"] - ll["normal"],
            "loglik_gain_confined": ll["confined"] - ll["normal"],
            "loglik_gain_directed": ll["directed"] - ll["normal"],
            "step_corr_lag1": stats_[:, 0],
            "non_gaussian": stats_[:, 1],
            "straightness": stats_[:, 2],
            "gyration_asymmetry": stats_[:, 3],
        }
    )
    assert set(out["motion_class"]) <= set(MOTION_CLASSES)
    return out


# ------------------------------------------------------------------------------------------ sample level
@dataclass(frozen=True)
class SampleMotion:
    """Motion verdict of a sample: ensemble alpha, ergodicity, heterogeneity, class fractions and flags.

    Attributes
    ----------
    alpha, alpha_ci95 : ensemble anomalous exponent (localisation-noise and blur corrected) from one power-law
        spectrum with a noise term, fitted to the steps of all tracks long enough to classify (split at
        missed frames; see ``_pooled_spectrum_alpha``), and its 95 % interval (bootstrap over tracks, widened
        to the profile-likelihood interval when that is wider). ``numbers`` gives ``n_tracks_alpha`` and
        ``n_runs_alpha`` (runs of consecutive frames).
    n_tracks : tracks in the table; n_tracks_used : tracks long enough to classify and not immobile (they
        enter the heterogeneity and ergodicity numbers).
    class_counts, class_fractions : per-track motion classes.
    msd_comparison : DataFrame ``lag_frames, lag_s, ta_msd_um2, ea_msd_um2, n_tracks`` (time-averaged MSD
        averaged over tracks, and ensemble-averaged MSD from each track's first position).
    alpha_ta, alpha_ea : log-log slopes of the two over the same lags; alpha_ea_minus_ta_ci99 the 99 %
        bootstrap interval of their difference.
    ergodicity_breaking, ergodicity_breaking_brownian : EB = Var/mean² over tracks of the time-averaged MSD at
        ``eb_lag_frames``, and its value expected for Brownian motion with the sample's D, noise and track
        lengths (Qian's ratio generalised to localisation noise).
    non_gaussian, non_gaussian_se : non-Gaussian parameter of the pooled one-frame displacements (0 for
        Gaussian), and the same after scaling each track by its own mean square (``non_gaussian_within``).
    heterogeneity_ratio, heterogeneity_p, amplitude_spread : Cochran's Q/(n−1) of per-track log amplitudes
        (D or K at the ensemble alpha) against their finite-track errors, its p-value, and the estimated
        intrinsic SD of log amplitude (≈ relative spread of D).
    drift_um_s, drift_corrected : from the drift estimate.
    flags : plain words (see :func:`sample_motion`); numbers : the number behind each flag.
    """

    alpha: float
    alpha_ci95: tuple[float, float]
    n_tracks: int
    n_tracks_used: int
    class_counts: dict
    class_fractions: dict
    msd_comparison: pd.DataFrame = field(repr=False)
    alpha_ta: float
    alpha_ea: float
    alpha_ea_minus_ta_ci99: tuple[float, float]
    ergodicity_breaking: float
    ergodicity_breaking_brownian: float
    non_gaussian: float
    non_gaussian_se: float
    non_gaussian_within: float
    heterogeneity_ratio: float
    heterogeneity_p: float
    amplitude_spread: float
    drift_um_s: tuple
    drift_corrected: bool
    flags: tuple
    numbers: dict

    def to_dict(self) -> dict:
        """Plain JSON-ready dictionary (the MSD comparison table as lists)."""
        out = {k: getattr(self, k) for k in self.__dataclass_fields__ if k != "msd_comparison"}
        out["msd_comparison"] = {c: self.msd_comparison[c].tolist() for c in self.msd_comparison.columns}
        out["flags"] = list(self.flags)
        out["alpha_ci95"] = list(self.alpha_ci95)
        out["alpha_ea_minus_ta_ci99"] = list(self.alpha_ea_minus_ta_ci99)
        out["drift_um_s"] = list(self.drift_um_s)
        return _json_safe(out)


def _json_safe(v):
    """Numbers as plain Python (NaN and infinities as None), recursively."""
    if isinstance(v, dict):
        return {str(k): _json_safe(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_json_safe(x) for x in v]
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        return float(v) if np.isfinite(v) else None
    return v


def _refine_max(y: np.ndarray, grid: np.ndarray):
    """Argmax with parabolic refinement on a uniform grid, per row of y (B, G)."""
    y = np.atleast_2d(y)
    B, G = y.shape
    i = np.argmax(y, axis=1)
    r = np.arange(B)
    inner = (i >= 1) & (i <= G - 2)
    y0 = y[r, np.clip(i - 1, 0, G - 1)]
    y1 = y[r, i]
    y2 = y[r, np.clip(i + 1, 0, G - 1)]
    den = y0 - 2 * y1 + y2
    off = np.where(inner & (den < 0), np.clip(0.5 * (y0 - y2) / np.where(den < 0, den, -1.0), -1, 1), 0.0)
    return grid[i] + off * (grid[1] - grid[0])


#: Shortest run of consecutive frames (positions) that enters the pooled ensemble alpha.
MIN_RUN_POINTS = 5
#: Largest number of bootstrap units (tracks, or random blocks of tracks when there are more).
_MAX_BOOT_UNITS = 2000


def _contiguous_runs(tracks: pd.DataFrame, keep_ids: np.ndarray, min_run_points: int = MIN_RUN_POINTS):
    """Split the tracks in ``keep_ids`` into runs of consecutive observed frames (position arrays (n, d)).

    Missed frames split a track instead of being filled: interpolated positions have smaller, positively
    correlated steps, which reads as superdiffusion. Returns the runs and the index (into ``keep_ids``) of
    the track each run belongs to.
    """
    cols = position_columns(tracks)
    t = tracks["track"].to_numpy()
    f = tracks["frame"].to_numpy().astype(np.int64)
    xyz = np.column_stack([tracks[c].to_numpy(float) for c in cols])
    sel = np.isin(t, keep_ids) & np.all(np.isfinite(xyz), axis=1)
    if not sel.all():
        t, f, xyz = t[sel], f[sel], xyz[sel]
    if t.size == 0:
        return [], np.zeros(0, np.int64)
    # tables from the pipeline are already in (track, frame) order: sort only when they are not
    if not (np.all(t[1:] >= t[:-1]) and np.all((t[1:] != t[:-1]) | (f[1:] > f[:-1]))):
        order = np.lexsort((f, t))
        t, f, xyz = t[order], f[order], xyz[order]
    brk = np.concatenate([[True], (t[1:] != t[:-1]) | (f[1:] != f[:-1] + 1)])
    start = np.flatnonzero(brk)
    stop = np.append(start[1:], t.size)
    long = (stop - start) >= int(min_run_points)
    start, stop = start[long], stop[long]
    owner = np.searchsorted(keep_ids, t[start]) if start.size else np.zeros(0, np.int64)
    return [xyz[a:b] for a, b in zip(start.tolist(), stop.tolist(), strict=True)], owner.astype(np.int64)


def _runs_from_fits(fits: _Fits, min_run_points: int = MIN_RUN_POINTS):
    """:func:`_contiguous_runs` of the usable tracks, read from the fits' observed positions.

    Same runs in the same order (tracks by increasing id, runs by frame) without going back to the table:
    an ungapped track is one run, a gapped one is split where its observed frames jump.
    """
    runs, owner = [], []
    xyz = fits.xyz
    for k, i in enumerate(np.flatnonzero(fits.usable).tolist()):
        s0, n = int(fits.starts[i]), int(fits.n_points[i])
        if fits.gapped[i]:
            cut = np.flatnonzero(np.diff(fits.gap_frames[i]) != 1) + 1
            bounds = np.concatenate([[0], cut, [n]]).tolist()
        else:
            bounds = [0, n]
        for a, b in zip(bounds[:-1], bounds[1:], strict=True):
            if b - a >= int(min_run_points):
                runs.append(xyz[s0 + a : s0 + b])
                owner.append(k)
    return runs, np.asarray(owner, dtype=np.int64)


def _pooled_spectrum_alpha(
    runs: list,
    owner: np.ndarray,
    exposure_ratio: float,
    rng: np.random.Generator,
    n_boot: int,
    known: dict | None = None,
):
    """Ensemble alpha from one power-law-plus-noise spectrum shared by all runs; bootstrap over tracks.

    Every run keeps its own periodogram and its own finite-length expected spectrum, but the scale
    (per-axis MSD at one frame) and the noise ratio are shared by the sample and profiled out once, on the
    pooled Whittle likelihood Σ_runs Σ_k w_k [log S_k + P_k / S_k]. Because the expected periodogram is linear
    in scale and noise, a sample of tracks with different D and localisation errors but one alpha still has
    an expected pooled spectrum of this form, so alpha is consistent as the number of tracks grows at fixed
    track length. Summing per-track profile likelihoods instead (each track with its own scale and noise)
    is not: with two nuisance parameters per short track the pooled maximum drifts upward (about +0.3 at
    10 positions per track, +0.1 at 20, +0.04 at 30 for Brownian tracks: the Neyman–Scott problem).

    ``known`` optionally maps a run length (positions) to (run indices, their periodograms) already computed
    with the same taper (classify's fits of whole ungapped tracks); the other runs' periodograms are computed
    here. The per-unit sums Σ_runs Σ_k w_k P_k / spec_k are formed by summing the periodograms of a unit
    first and applying the spectra once (the sum is linear in P).

    Returns alpha, (lo, hi) of its 95 % interval (bootstrap over tracks, widened to the pooled profile-
    likelihood interval when that is wider) and the number of runs used.

    References
    ----------
    J. Neyman & E. L. Scott, Econometrica 16, 1 (1948) (many nuisance parameters).
    A. M. Sykulski et al., Biometrika 106, 251 (2019) (debiased Whittle likelihood).
    B. Efron & R. J. Tibshirani, An Introduction to the Bootstrap (Chapman & Hall, 1993).
    """
    from .motion_models import NOISE_RATIO_GRID, _bank, _interval, _profile_noise, periodograms

    nan = (np.nan, (np.nan, np.nan), 0)
    if not runs:
        return nan
    n_axes = runs[0].shape[1]
    A, R = ALPHA_GRID.size, NOISE_RATIO_GRID.size
    lengths = np.array([r.shape[0] for r in runs], dtype=np.int64)
    n_units = int(owner.max()) + 1 if owner.size else 0
    # bootstrap units: tracks, or random blocks of tracks when there are very many
    unit = owner if n_units <= _MAX_BOOT_UNITS else rng.permutation(n_units)[owner] % _MAX_BOOT_UNITS
    n_units = int(unit.max()) + 1
    wts = (
        rng.multinomial(n_units, np.full(n_units, 1.0 / n_units), size=n_boot).astype(float)
        if (n_boot > 0 and n_units >= 2)
        else np.zeros((0, n_units))
    )
    B = wts.shape[0]
    # per bootstrap unit: Σ_runs Σ_k w_k P_k / spec_k, and its number of runs of each length
    Qu = np.zeros((n_units, A * R))
    groups = np.unique(lengths)
    Cu = np.zeros((n_units, groups.size))
    logdets = np.zeros((groups.size, A * R))  # Σ_k w_k log spec_k of one run, per length
    w_sums = np.zeros(groups.size)  # Σ_k w_k per length
    valid = np.ones(A * R, bool)
    e = round(float(exposure_ratio), 4)
    for j, n_pts in enumerate(groups):
        idx = np.flatnonzero(lengths == n_pts)
        bank = _bank(int(n_pts) - 1, e)
        # as in the per-track fits, a negative noise ratio may remove at most half of the signal spectrum;
        # cells beyond that are dropped below (their spectrum is only clipped here to stay positive)
        half = 0.5 * bank.fbm
        pos = bank.noise > 0
        r_min = -np.min(half[:, pos] / bank.noise[pos], axis=1) if pos.any() else np.full(A, -np.inf)
        valid &= (NOISE_RATIO_GRID[None, :] >= r_min[:, None]).reshape(A * R)
        spec = bank.fbm[:, None, :] + NOISE_RATIO_GRID[None, :, None] * bank.noise[None, None, :]
        spec = np.maximum(spec, half[:, None, :], out=spec).reshape(A * R, -1)
        w = bank.weights
        logdets[j] = np.log(spec) @ w
        w_sums[j] = w.sum()
        P = np.empty((idx.size, w.size))
        todo = np.ones(idx.size, bool)
        if known and int(n_pts) in known:
            k_idx, k_P = known[int(n_pts)]
            at = np.searchsorted(idx, k_idx)  # idx is increasing; k_idx are runs of this length
            P[at] = k_P
            todo[at] = False
        if todo.any():
            steps = np.stack([np.diff(runs[i], axis=0) for i in idx[todo]])
            P[todo] = periodograms(steps, bank.taper)
        u = unit[idx]
        order = np.argsort(u, kind="stable")
        uniq, first, n_of = np.unique(u[order], return_index=True, return_counts=True)
        Pu = np.add.reduceat(P[order], first, axis=0)  # periodograms summed per unit
        Qu[uniq] += Pu @ (w[None, :] / spec).T  # (units, A·R)
        Cu[uniq, j] += n_of
    # the sample (row 0) and each bootstrap replicate (units drawn with their multiplicities)
    draw = np.vstack([np.ones((1, n_units)), wts])  # (1 + B, n_units)
    Q = draw @ Qu
    counts = draw @ Cu  # runs of each length per replicate
    LD = counts @ logdets  # Σ_runs Σ_k w_k log spec_k
    Wt = counts @ w_sums  # Σ_runs Σ_k w_k
    with np.errstate(divide="ignore", invalid="ignore"):
        ll = -n_axes * (LD + Wt[:, None] * (np.log(np.maximum(Q, 1e-300) / (n_axes * Wt[:, None])) + 1.0))
    ll[:, ~valid] = -np.inf
    ll[~np.isfinite(ll)] = -np.inf
    prof, _, _ = _profile_noise(ll.reshape(1 + B, A, R))  # (1 + B, A)
    a_hat = float(_refine_max(prof[:1], ALPHA_GRID)[0])
    lo_p, hi_p = _interval(prof[:1], np.array([np.max(prof[0]) - 1.920729]))
    if B >= 2:
        boot = _refine_max(prof[1:], ALPHA_GRID)
        lo_b, hi_b = np.quantile(boot, [0.025, 0.975])
    else:
        lo_b, hi_b = lo_p[0], hi_p[0]
    return a_hat, (float(min(lo_b, lo_p[0])), float(max(hi_b, hi_p[0]))), len(runs)


def _known_runs(fits: _Fits, runs: list, owner: np.ndarray) -> dict:
    """Find the runs that are whole ungapped fitted tracks, whose periodograms classify's fits hold.

    ``owner`` indexes the usable tracks in increasing id order (as :func:`_contiguous_runs` gets them); a run
    as long as its ungapped track is that track's steps, so its periodogram (same taper) is the fitted one.
    Returns {run length: (run indices, periodograms)}.
    """
    if not runs or fits.gapped is None:
        return {}
    usable_idx = np.flatnonzero(fits.usable)
    track = usable_idx[owner]
    span = np.array([fits.positions[i].shape[0] for i in track], dtype=np.int64)
    rl = np.array([r.shape[0] for r in runs], dtype=np.int64)
    whole = (~fits.gapped[track]) & (rl == span) & (rl == fits.n_points[track])
    out = {}
    for n_pts, (f_idx, f_P) in fits.periodograms.items():
        ri = np.flatnonzero(whole & (rl == n_pts))
        if ri.size:
            out[int(n_pts)] = (ri, f_P[np.searchsorted(f_idx, track[ri])])
    return out


def _heterogeneity(log_a: np.ndarray, se: np.ndarray):
    """Cochran's Q of per-track log amplitudes, its p-value and the DerSimonian–Laird between-track SD."""
    n = log_a.size
    if n < 3:
        return np.nan, np.nan, np.nan
    w = 1.0 / se**2
    mean = np.sum(w * log_a) / w.sum()
    Q = float(np.sum(w * (log_a - mean) ** 2))
    p = float(special.chdtrc(n - 1, Q))  # chi-square survival function
    tau2 = max(0.0, (Q - (n - 1)) / (w.sum() - np.sum(w**2) / w.sum()))
    return Q / (n - 1), p, float(np.sqrt(tau2))


def _bootstrap_weights(g: np.random.Generator, n: int, n_boot: int) -> np.ndarray | None:
    """Bootstrap weights over n tracks (n_boot, n): multinomial counts of n draws as floats; None if n < 3."""
    if n >= 3 and n_boot > 0:
        return g.multinomial(n, np.full(n, 1.0 / n), size=n_boot).astype(float)
    return None


def sample_motion(
    tracks: pd.DataFrame,
    track_classes: pd.DataFrame,
    sample_fit=None,
    drift=None,
    *,
    frame_interval_s: float,
    exposure_s: float | None = None,
    track_fits: pd.DataFrame | None = None,
    drift_corrected: bool | None = None,
    min_points: int = 10,
    min_tracks: int = 20,
    min_class_fraction: float = 0.25,
    eb_lag_frames: int = 1,
    alpha_tolerance: float = 0.05,
    n_boot: int = 400,
    rng=0,
) -> SampleMotion:
    """Sample-level motion: ensemble alpha with its interval, ergodicity, heterogeneity and flags.

    Parameters
    ----------
    tracks : DataFrame
        The tracks the classes were computed on (drift already removed when it was), µm.
    track_classes : DataFrame
        Output of :func:`classify_tracks` (``track, motion_class`` are used).
    sample_fit : SampleFit, optional
        From :func:`msdkit.fit.fit_sample`; its alpha is reported beside the pooled one in ``numbers``.
    drift : DriftEstimate, optional
        From :func:`msdkit.drift.estimate_drift`; sets the ``drift`` flag.
    frame_interval_s, exposure_s : float, s
    drift_corrected : bool, optional
        Whether ``tracks`` had the drift removed; default: the drift's ``safe_to_subtract``.
    min_tracks : int, default=20
        Fewer usable tracks give the ``few_tracks`` flag.
    min_class_fraction : float, default=0.25
        Fraction of the fitted tracks (long enough to classify, ``undetermined`` ones included) of one class
        (confined, directed) above which the sample is flagged with it, provided it is also significantly
        above the 5 % a class gets by chance (binomial test, p < 0.001). Counting the undetermined tracks
        keeps a few short Brownian tracks that look directed by chance from flagging a sample whose other
        short tracks could not be told apart.
    eb_lag_frames : int, default=1
        Lag of the ergodicity-breaking parameter.
    alpha_tolerance : float, default=0.05
        Practical margin of the ensemble alpha: ``subdiffusive`` needs the upper end of its 95 % interval
        below 1 − tolerance, ``superdiffusive`` the lower end above 1 + tolerance. On tracks it covers the
        model accuracy; on movies also what detection and linking leave behind (spots lost when particles
        pass each other, joins to the wrong particle), which moved the alpha of Brownian bead movies by up to
        ±0.05 (benchmarks/movie_flags.py).
    n_boot : int, default=400
        Bootstrap replicates over tracks.
    rng : int, Generator or None

    Returns
    -------
    SampleMotion

    Notes
    -----
    Flags (plain words), each with its number in ``numbers``:

    * ``subdiffusive``: the upper end of the 95 % interval of the ensemble alpha is below
      1 − ``alpha_tolerance`` (``alpha_ci95_hi``); ``superdiffusive``: its lower end is above
      1 + ``alpha_tolerance`` (``alpha_ci95_lo``).
    * ``confined`` / ``directed``: at least ``min_class_fraction`` of the fitted tracks are confined /
      directed and that fraction is significantly above 5 % (``fraction_confined``, ``fraction_directed``).
    * ``heterogeneous``: per-track amplitudes (D, or K at the ensemble alpha) spread more than their finite-
      track errors explain (Cochran's Q test p < 0.001) by at least 25 % intrinsic SD on the log scale
      (``amplitude_spread``).
    * ``nonergodic``: the log-log slopes of the ensemble-averaged and the time-averaged MSD differ: the
      99 % bootstrap interval of the difference excludes 0 and the difference exceeds 0.2 in size
      (``alpha_ea_minus_ta``) (Metzler et al. 2014).
    * ``drift``: a significant common drift (``drift_speed_um_s``, ``drift_p_value``).
    * ``few_tracks``: fewer than ``min_tracks`` usable tracks (``n_tracks_used``).

    References
    ----------
    R. Metzler, J.-H. Jeon, A. G. Cherstvy & E. Barkai, Phys. Chem. Chem. Phys. 16, 24128 (2014).
    H. Qian, M. P. Sheetz & E. L. Elson, Biophys. J. 60, 910 (1991).
    R. DerSimonian & N. Laird, Control. Clin. Trials 7, 177 (1986) (between-track spread).
    A. Rahman, Phys. Rev. 136, A405 (1964) (non-Gaussian parameter).
    """
    from .motion_models import amplitude_at_alpha, brownian_msd_um2, ta_msd_relative_variance

    exposure = _check_tracks(tracks, frame_interval_s, exposure_s)
    if not isinstance(track_classes, pd.DataFrame) or not {"track", "motion_class"} <= set(
        track_classes.columns
    ):
        raise InputError(
            expected_got(
                "track_classes",
                "the DataFrame returned by classify_tracks",
                type(track_classes).__name__,
                "Call classify_tracks first.",
            )
        )
    g = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    dt = float(frame_interval_s)
    e = exposure / dt
    fits = _fit_all(tracks, dt, exposure, min_points)
    cls = track_classes.set_index("track")["motion_class"].reindex(fits.ids).fillna("undetermined").to_numpy()
    # tracks without a row in track_classes (a sample set wider than the classified tracks, e.g. the short
    # tracks of a movie) enter alpha and the spreads but not the class fractions
    classified = np.isin(fits.ids, track_classes["track"].to_numpy())
    use = fits.usable & (cls != "immobile")
    n_used = int(use.sum())

    # ensemble alpha from one spectrum shared by all usable tracks, split at missed frames; tracks called
    # immobile stay in (they only add to the shared noise term, and leaving out the short Brownian tracks
    # that look immobile by chance would select against low alpha)
    if fits.xyz is not None:  # the fits hold the observed positions in (track, frame) order
        runs, owner = _runs_from_fits(fits)
    else:
        runs, owner = _contiguous_runs(tracks, np.sort(fits.ids[fits.usable]))
    known = _known_runs(fits, runs, owner)  # whole ungapped tracks: periodograms from the fits
    alpha, alpha_ci, n_runs = _pooled_spectrum_alpha(runs, owner, e, g, n_boot, known=known)
    n_alpha = int(np.unique(owner).size)
    # the bootstrap weights of the MSD comparison below are g's next draws: made beside the per-track sums
    # when the analysis may use a second thread (numpy's multinomial releases the GIL; nothing else draws
    # from g before they are collected), else here; the same numbers either way
    beside = Beside(rows=len(tracks))
    boot_job = beside.submit(_bootstrap_weights, g, n_used, n_boot)

    # class fractions
    counts = {c: int(np.sum(cls[classified] == c)) for c in MOTION_CLASSES}
    n_cls = max(1, sum(v for k, v in counts.items() if k != "undetermined"))
    fractions = {c: counts[c] / n_cls for c in MOTION_CLASSES if c != "undetermined"}
    fractions["undetermined"] = counts["undetermined"] / max(1, int(classified.sum()))

    # heterogeneity of per-track amplitudes at the ensemble alpha
    het_ratio = het_p = spread = np.nan
    if n_used >= 3 and np.isfinite(alpha):
        span = np.array([p.shape[0] for p in fits.positions])
        la, se = np.zeros(fits.ids.size), np.ones(fits.ids.size)
        for n_pts in np.unique(span[use]):
            idx = np.flatnonzero(use & (span == n_pts))
            f_idx, f_P = fits.periodograms[int(n_pts)]  # the classify fits' periodograms of the same steps
            la[idx], se[idx] = amplitude_at_alpha(
                None,
                exposure_ratio=e,
                alpha=alpha,
                periodogram=f_P[np.searchsorted(f_idx, idx)],
                n_steps=int(n_pts) - 1,
                n_axes=fits.n_axes,
            )
        het_ratio, het_p, spread = _heterogeneity(la[use], se[use])

    # time-averaged vs ensemble-averaged MSD, ergodicity breaking, non-Gaussian parameter
    use_idx = np.flatnonzero(use)
    pos = [fits.positions[i] for i in use_idx]
    lengths = np.array([p.shape[0] for p in pos], dtype=int)
    n_max = int(max(1, min(50, np.median(lengths) // 4))) if pos else 1
    lags = np.arange(1, n_max + 1)
    n_tr = len(pos)
    ta_sum = np.zeros((n_tr, n_max))
    ta_cnt = np.zeros((n_tr, n_max))
    ea = np.zeros((n_tr, n_max))
    ea_cnt = np.zeros((n_tr, n_max))
    k_eb = int(max(1, eb_lag_frames))
    eb_col = np.full(n_tr, np.nan)  # per-track time-averaged MSD at lag k_eb
    s2_ = np.zeros(n_tr)  # per-track sums of squared one-frame steps, and of their squares
    s4_ = np.zeros(n_tr)
    # tracks sorted by length in cache-sized chunks; a chunk of equal lengths needs no padding (positions are
    # finite), a mixed chunk (short tracks of many lengths) is padded with NaN to its longest track
    by_len = np.argsort(lengths, kind="stable")
    budget = 262144 // fits.n_axes
    c0 = 0
    while c0 < n_tr:
        L = int(lengths[by_len[c0]])
        n_same = int(np.searchsorted(lengths[by_len], L, side="right")) - c0
        if n_same * L >= budget // 4 or n_same == n_tr - c0:
            gi = by_len[c0 : c0 + max(1, min(n_same, budget // L))]
        else:  # mixed chunk: grow while the padded block stays within the budget
            c1 = c0 + 1
            while c1 < n_tr and (c1 + 1 - c0) * int(lengths[by_len[c1]]) <= budget:
                c1 += 1
            gi = by_len[c0:c1]
            L = int(lengths[gi].max())
        c0 += gi.size
        if lengths[gi].min() != L:
            P = np.full((gi.size, L, fits.n_axes), np.nan)
            for r, i in enumerate(gi):
                P[r, : lengths[i]] = pos[i] - pos[i][0]
            for j, n in enumerate(lags):
                if n >= L:
                    break
                sq = np.sum((P[:, n:] - P[:, :-n]) ** 2, axis=2)
                ok = np.isfinite(sq)
                ta_sum[gi, j] = np.where(ok, sq, 0.0).sum(1) / np.maximum(ok.sum(1), 1)
                ta_cnt[gi, j] = ok.any(1)
                e2 = np.sum(P[:, n] ** 2, axis=1)
                ea_cnt[gi, j] = np.isfinite(e2)
                ea[gi, j] = np.where(np.isfinite(e2), e2, 0.0)
            if L > k_eb + 1:
                sq = np.sum((P[:, k_eb:] - P[:, :-k_eb]) ** 2, axis=2)
                ok = np.isfinite(sq)
                eb_col[gi] = np.where(ok, sq, 0.0).sum(1) / np.maximum(ok.sum(1), 1)
            r2 = np.sum(np.diff(P, axis=1) ** 2, axis=2)
            ok = np.isfinite(r2)
            s2_[gi] = np.where(ok, r2, 0.0).sum(1)
            s4_[gi] = np.where(ok, r2 * r2, 0.0).sum(1)
            continue
        Q = _stack_positions(fits.positions, fits.xyz, fits.starts, fits.gapped, use_idx[gi], L)
        Q = Q - Q[:, :1]
        m = min(n_max, L - 1)  # the lags shorter than the tracks, all at once (compiled)
        if m > 0:
            from ._msd_kernels import lag_square_sums

            ta_sum[gi, :m] = lag_square_sums(Q, m) / (L - lags[:m])
            ta_cnt[gi, :m] = 1.0
            e2 = _axis_power(Q[:, 1 : m + 1], np.empty((Q.shape[0], m)))  # einsum("gnj,gnj->gn"), bit for bit
            fin = np.isfinite(e2)
            ea_cnt[gi, :m] = fin
            ea[gi, :m] = np.where(fin, e2, 0.0)
        d1 = np.diff(Q, axis=1)
        if L > k_eb + 1:
            dk = d1 if k_eb == 1 else Q[:, k_eb:] - Q[:, :-k_eb]  # lag 1: the same differences as d1
            eb_col[gi] = np.einsum("gij,gij->g", dk, dk) / (L - k_eb)
        r2 = _axis_power(d1, np.empty(d1.shape[:2]))  # einsum("gij,gij->gi", d1, d1), bit for bit
        s2_[gi] = r2.sum(1)
        s4_[gi] = np.einsum("gi,gi->g", r2, r2)

    def _means(wts):
        with np.errstate(invalid="ignore", divide="ignore"):
            return (wts @ ta_sum) / (wts @ ta_cnt), (wts @ ea) / (wts @ ea_cnt)

    def _slopes(y):
        lx = np.log(lags)
        with np.errstate(invalid="ignore", divide="ignore"):
            ly = np.log(y)
        lxc = lx - lx.mean()
        return (ly @ lxc) / np.sum(lxc**2) if lags.size >= 2 else np.full(y.shape[0], np.nan)

    ta_mean, ea_mean = _means(np.ones((1, n_tr)))
    ta_mean, ea_mean = ta_mean[0], ea_mean[0]
    cmp = pd.DataFrame(
        {
            "lag_frames": lags.astype(np.int64),
            "lag_s": lags * dt,
            "ta_msd_um2": ta_mean,
            "ea_msd_um2": ea_mean,
            "n_tracks": ta_cnt.sum(0).astype(np.int64),
        }
    )
    a_ta = float(_slopes(ta_mean[None])[0])
    a_ea = float(_slopes(ea_mean[None])[0])
    diff_ci = (np.nan, np.nan)
    boot_w = boot_job.result()  # n_tr == n_used: the usable tracks
    beside.close()
    if boot_w is not None and n_max >= 2:
        bt, be = _means(boot_w)
        diffs = _slopes(be) - _slopes(bt)
        diffs = diffs[np.isfinite(diffs)]
        if diffs.size:
            diff_ci = tuple(float(v) for v in np.quantile(diffs, [0.005, 0.995]))

    eb = eb_exp = np.nan
    ok_eb = lengths > k_eb + 1
    if ok_eb.sum() >= 3:
        col = eb_col[ok_eb]
        eb = float(np.var(col) / np.mean(col) ** 2)
        D_bar = float(np.nanmedian(fits.D_um2_s[use]))
        s2 = float(np.nanmedian(fits.sigma_um[use] ** 2))
        qs = {}
        for L in np.unique(lengths[ok_eb]):
            t = np.arange(L) * dt
            M = brownian_msd_um2(
                t, D_um2_s=max(D_bar, 1e-12), sigma_um=np.sqrt(s2), exposure_s=exposure, n_dims=1
            )
            qs[L] = ta_msd_relative_variance(M, k_eb, L - 1, fits.n_axes)
        eb_exp = float(np.mean([qs[L] for L in lengths[ok_eb]]))

    ng = ng_se = ng_within = np.nan
    if n_tr:
        cnt = (lengths - 1).astype(float)
        kk = 1.0 + 2.0 / fits.n_axes

        def _ng(wts):
            with np.errstate(invalid="ignore", divide="ignore"):
                m2 = (wts @ s2_) / (wts @ cnt)
                m4 = (wts @ s4_) / (wts @ cnt)
                return m4 / (kk * m2 * m2) - 1.0

        ng = float(_ng(np.ones((1, n_tr)))[0])
        with np.errstate(invalid="ignore", divide="ignore"):
            m2i = s2_ / cnt
            ng_within = float(np.sum(s4_ / m2i**2) / cnt.sum() / kk - 1.0)
        if boot_w is not None:
            ng_se = float(np.nanstd(_ng(boot_w)))

    # flags
    flags: list[str] = []
    numbers: dict[str, float] = {
        "alpha": float(alpha),
        "alpha_ci95_lo": float(alpha_ci[0]),
        "alpha_ci95_hi": float(alpha_ci[1]),
        "n_tracks_used": n_used,
        "n_tracks_alpha": n_alpha,
        "n_runs_alpha": int(n_runs),
    }
    if np.isfinite(alpha_ci[1]) and alpha_ci[1] < 1.0 - alpha_tolerance:
        flags.append("subdiffusive")
    if np.isfinite(alpha_ci[0]) and alpha_ci[0] > 1.0 + alpha_tolerance:
        flags.append("superdiffusive")
    n_fitted = int((fits.usable & classified).sum())  # tracks classified, undetermined ones included
    for c in ("confined", "directed"):
        frac = counts[c] / n_fitted if n_fitted else 0.0
        numbers[f"fraction_{c}"] = float(frac)
        # P(X >= k) for X binomial(n, 0.05): the regularised incomplete beta function I_0.05(k, n - k + 1)
        k_c = int(counts[c])
        p_binom = float(special.betainc(k_c, n_fitted - k_c + 1, 0.05)) if n_fitted and k_c > 0 else 1.0
        numbers[f"fraction_{c}_p"] = p_binom
        if n_fitted and frac >= min_class_fraction and p_binom < 1e-3:
            flags.append(c)
    numbers["heterogeneity_ratio"] = float(het_ratio)
    numbers["heterogeneity_p"] = float(het_p)
    numbers["amplitude_spread"] = float(spread)
    if np.isfinite(het_p) and het_p < 1e-3 and spread >= 0.25:
        flags.append("heterogeneous")
    d_ea = a_ea - a_ta if np.isfinite(a_ea) and np.isfinite(a_ta) else np.nan
    numbers["alpha_ea_minus_ta"] = float(d_ea)
    numbers["ergodicity_breaking"] = float(eb)
    numbers["ergodicity_breaking_brownian"] = float(eb_exp)
    if (
        np.isfinite(d_ea)
        and np.isfinite(diff_ci[0])
        and (diff_ci[0] > 0 or diff_ci[1] < 0)
        and abs(d_ea) > 0.2
    ):
        flags.append("nonergodic")
    drift_v = tuple(float(v) for v in drift.velocity_um_s) if drift is not None else (0.0, 0.0)
    corrected = (
        bool(drift.safe_to_subtract)
        if (drift is not None and drift_corrected is None)
        else bool(drift_corrected)
    )
    if drift is not None:
        numbers["drift_speed_um_s"] = float(np.hypot.reduce(np.asarray(drift_v)))
        numbers["drift_p_value"] = float(drift.p_value)
        if drift.significant:
            flags.append("drift")
    if n_used < min_tracks:
        flags.append("few_tracks")
    numbers["non_gaussian"] = float(ng)
    if sample_fit is not None:
        numbers["alpha_msd_fit"] = float(getattr(sample_fit, "alpha", np.nan))
    return SampleMotion(
        alpha=float(alpha),
        alpha_ci95=(float(alpha_ci[0]), float(alpha_ci[1])),
        n_tracks=int(fits.ids.size),
        n_tracks_used=n_used,
        class_counts=counts,
        class_fractions=fractions,
        msd_comparison=cmp,
        alpha_ta=float(a_ta),
        alpha_ea=float(a_ea),
        alpha_ea_minus_ta_ci99=diff_ci,
        ergodicity_breaking=float(eb),
        ergodicity_breaking_brownian=float(eb_exp),
        non_gaussian=float(ng),
        non_gaussian_se=float(ng_se),
        non_gaussian_within=float(ng_within),
        heterogeneity_ratio=float(het_ratio),
        heterogeneity_p=float(het_p),
        amplitude_spread=float(spread),
        drift_um_s=drift_v,
        drift_corrected=corrected,
        flags=tuple(flags),
        numbers=numbers,
    )
