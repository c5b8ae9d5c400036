"""Motion classes per track and sample-level motion flags.

Per track, five models of the steps are fitted by likelihood (see :mod:`msdkit.motion_models`): immobile
(localisation noise only), Brownian with localisation offset and motion blur, power law (fractional Brownian
motion) with offset, confined in a box (reflecting walls, plateau L²/6 per axis) and diffusion plus a constant
velocity. The likelihood of the steps accounts for the correlation of the MSD points, which a least-squares fit
of the time-averaged MSD ignores. The model with the highest penalised log-likelihood gives the class (penalties
are χ² quantiles, see :data:`DEFAULT_PENALTIES`); the interval of alpha comes from the profile likelihood, and a
track is anomalous exactly when that interval excludes 1 and the power law beats the other models.

Per sample, :func:`sample_motion` pools the per-track alpha profiles into an ensemble alpha (noise- and
blur-corrected, because every track carries its own noise level), with a bootstrap interval over tracks, and
compares time-averaged and ensemble-averaged MSDs, the spread of per-track MSDs with what finite tracks explain,
and the shape of the displacement distribution, to set plain-word flags.

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

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

from .errors import InputError, expected_got
from .motion_models import ALPHA_GRID, fit_step_models
from .schema import MOTION_CLASSES

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
    "immobile": -0.5 * float(stats.chi2.ppf(0.99, 1)),
    "normal": 0.0,
    "anomalous": 0.5 * float(stats.chi2.ppf(0.95, 1)),
    "confined": 0.5 * float(stats.chi2.ppf(0.99, 1)),
    "directed": 0.5 * float(stats.chi2.ppf(0.99, 2)),
}

_MODEL_PARAMS = {"immobile": 1, "normal": 2, "anomalous": 3, "confined": 3, "directed": 4}


# ------------------------------------------------------------------------------------------ track data
@dataclass
class _TrackArrays:
    ids: np.ndarray  # (T,)
    n_points: np.ndarray  # observed positions per track
    positions: list  # per track (n_frames_span, d) on the frame grid, gaps filled by linear interpolation


def _coordinate_columns(tracks: pd.DataFrame) -> tuple[str, ...]:
    return ("x_um", "y_um", "z_um") if "z_um" in tracks.columns else ("x_um", "y_um")


def _check_tracks(tracks, frame_interval_s, exposure_s):
    if not isinstance(tracks, pd.DataFrame):
        raise InputError(expected_got("tracks", "a DataFrame with columns track, frame, x_um, y_um",
                                      type(tracks).__name__, "Pass a track table."))
    need = ("track", "frame", "x_um", "y_um")
    missing = [c for c in need if c not in tracks.columns]
    if missing:
        raise InputError(expected_got("tracks columns", ", ".join(need), list(tracks.columns),
                                      f"Add the missing column(s) {missing} (positions in µm)."))
    if not (frame_interval_s is not None and np.isfinite(frame_interval_s) and frame_interval_s > 0):
        raise InputError(expected_got("frame_interval_s", "> 0", frame_interval_s, "Give seconds per frame."))
    exposure = frame_interval_s if exposure_s is None else float(exposure_s)
    if not 0 <= exposure <= frame_interval_s * (1 + 1e-9):
        raise InputError(expected_got("exposure_s", f"between 0 and frame_interval_s={frame_interval_s}",
                                      exposure_s, "The exposure cannot exceed the frame interval."))
    return min(exposure, frame_interval_s)


def _track_arrays(tracks: pd.DataFrame) -> _TrackArrays:
    cols = _coordinate_columns(tracks)
    t = tracks["track"].to_numpy()
    f = tracks["frame"].to_numpy().astype(np.int64)
    xyz = np.column_stack([tracks[c].to_numpy(float) for c in cols])
    ok = np.all(np.isfinite(xyz), axis=1)
    t, f, xyz = t[ok], f[ok], xyz[ok]
    order = np.lexsort((f, t))
    t, f, xyz = t[order], f[order], xyz[order]
    if t.size == 0:
        return _TrackArrays(np.zeros(0, np.int64), np.zeros(0, np.int64), [])
    dup = (t[1:] == t[:-1]) & (f[1:] == f[:-1])
    if dup.any():
        i = int(np.flatnonzero(dup)[0])
        raise InputError(expected_got("tracks: (track, frame) pairs", "unique",
                                      f"track {t[i]} has frame {f[i]} twice", "Keep one position per track and frame."))
    start = np.flatnonzero(np.concatenate([[True], t[1:] != t[:-1]]))
    stop = np.append(start[1:], t.size)
    positions = []
    for a, b in zip(start, stop):
        fr = f[a:b]
        p = xyz[a:b]
        span = int(fr[-1] - fr[0] + 1)
        if span != b - a:
            grid = np.arange(fr[0], fr[-1] + 1)
            p = np.column_stack([np.interp(grid, fr, p[:, j]) for j in range(p.shape[1])])
        positions.append(p)
    return _TrackArrays(t[start].astype(np.int64), (stop - start).astype(np.int64), positions)


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


def _fit_all(tracks: pd.DataFrame, frame_interval_s: float, exposure_s: float, min_points: int) -> _Fits:
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
    for n_pts in np.unique(span[usable]):
        idx = np.flatnonzero(usable & (span == n_pts))
        steps = np.stack([np.diff(arr.positions[i], axis=0) for i in idx])
        f = fit_step_models(steps, exposure_ratio=e)
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
        out["sigma"][idx] = np.sqrt(f.brown_noise / 2.0)
        L2 = 6.0 * f.conf_plateau
        out["L"][idx] = np.sqrt(L2)
        out["tau"][idx] = f.conf_tau * dt
        out["cnoise"][idx] = f.conf_noise / 2.0
        var_end = f.dir_scale * (Ns - e / 3.0) + f.dir_noise  # per-axis variance of the end-to-end step
        excess = np.sum(f.end_to_end**2, axis=1) - steps.shape[2] * var_end
        out["v"][idx] = np.sqrt(np.clip(excess, 0.0, None)) / (Ns * dt)
    return _Fits(
        ids=arr.ids, n_points=arr.n_points, usable=usable, ll=ll, alpha=out["alpha"], alpha_lo=out["alpha_lo"],
        alpha_hi=out["alpha_hi"], alpha_profile=profile, D_um2_s=out["D"], K_um2_s_alpha=out["K"],
        sigma_um=out["sigma"], conf_L_um=out["L"], conf_tau_s=out["tau"], conf_noise_um2=out["cnoise"],
        speed_um_s=out["v"], n_axes=n_axes, positions=arr.positions,
    )


def _choose(fits: _Fits, *, frame_interval_s: float, penalties: dict, sigma_um: float | None,
            max_alpha_ci_width: float):
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
        (``alpha_ci95_lo``, ``alpha_ci95_hi``), ``D_um2_s`` and ``sigma_um`` of the Brownian model,
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
    >>> pos = fbm_positions(5, 300, alpha=0.4, K_um2_s_alpha=0.1, frame_interval_s=0.05, rng=0)
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
            raise ValueError(expected_got("penalties keys", f"some of {sorted(pens)}", sorted(unknown),
                                          "Name the models whose penalty you change."))
        pens.update({k: float(v) for k, v in penalties.items()})
    fits = _fit_all(tracks, frame_interval_s, exposure, min_points)
    labels, conf, score = _choose(fits, frame_interval_s=frame_interval_s, penalties=pens, sigma_um=sigma_um,
                                  max_alpha_ci_width=max_alpha_ci_width)
    T = fits.ids.size
    stats_ = np.array([_step_statistics(p) for p in fits.positions]) if T else np.zeros((0, 4))
    is_conf = labels == "confined"
    is_dir = labels == "directed"
    ll = fits.ll
    out = pd.DataFrame({
        "track": fits.ids,
        "n_points": fits.n_points,
        "motion_class": labels,
        "class_confidence": conf,
        "alpha": fits.alpha,
        "alpha_ci95_lo": fits.alpha_lo,
        "alpha_ci95_hi": fits.alpha_hi,
        "D_um2_s": fits.D_um2_s,
        "K_um2_s_alpha": fits.K_um2_s_alpha,
        "sigma_um": fits.sigma_um,
        "confinement_um": np.where(is_conf, fits.conf_L_um, np.nan),
        "confinement_time_s": np.where(is_conf, fits.conf_tau_s, np.nan),
        "speed_um_s": np.where(is_dir, fits.speed_um_s, np.nan),
        "loglik_gain_mobile": np.fmax(np.fmax(ll["normal"], ll["anomalous"]), ll["confined"]) - ll["immobile"],
        "loglik_gain_anomalous": ll["anomalous"] - ll["normal"],
        "loglik_gain_confined": ll["confined"] - ll["normal"],
        "loglik_gain_directed": ll["directed"] - ll["normal"],
        "step_corr_lag1": stats_[:, 0],
        "non_gaussian": stats_[:, 1],
        "straightness": stats_[:, 2],
        "gyration_asymmetry": stats_[:, 3],
    })
    assert set(out["motion_class"]) <= set(MOTION_CLASSES)
    return out
