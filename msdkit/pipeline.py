"""One input through the stages: read → detect → link → drift → MSD → fit → classify → size → write.

This module holds no science: it turns config sections into plain keyword arguments, calls the stage
functions in order and writes their results. See DEVELOPERS.md for the stage contracts.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import threading
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import schema
from ._memory import keeps_freed_memory
from ._threads import Beside, StopFlag
from ._version import __version__
from .errors import FitError, InputError, expected_got

log = logging.getLogger(__name__)

TABLE_SUFFIXES = (".csv", ".parquet", ".pq", ".tsv")


@dataclass(frozen=True)
class AnalysisResult:
    """Everything measured on one sample's tracks."""

    tracks: pd.DataFrame
    track_fits: pd.DataFrame
    ensemble_msd: pd.DataFrame
    summary: dict[str, Any]
    size_table: pd.DataFrame | None = None


@dataclass(frozen=True)
class InputOutcome:
    """The batch-level outcome of one input (one row of batch_summary.csv)."""

    stack: str
    status: str
    error: str = ""
    n_tracks: int = 0
    D_um2_s: float = math.nan
    alpha: float = math.nan
    radius_nm: float = math.nan
    flags: list[str] = field(default_factory=list)
    extra: dict[str, Any] = field(default_factory=dict)


def _in_track_frame_order(tracks: pd.DataFrame) -> pd.DataFrame:
    """Return the table sorted by track then frame, with a fresh RangeIndex.

    Tables from msdkit's readers are in that order already: one compiled pass confirms it and the sort (a
    full copy of the table) is skipped; under pandas' copy-on-write the caller's table is never modified.
    """
    from . import _msd_kernels as k

    t, f = tracks["track"].to_numpy(), tracks["frame"].to_numpy()
    if t.size and t.dtype.kind in "iu" and f.dtype.kind in "iu" and k.scan_order(t, f)[0] == 0:
        return tracks.reset_index(drop=True)
    return tracks.sort_values(["track", "frame"], kind="stable").reset_index(drop=True)


def _finite_or_none(value):
    if value is None:
        return None
    if isinstance(value, (list, tuple, np.ndarray)):
        return [_finite_or_none(v) for v in value]
    try:
        f = float(value)
    except (TypeError, ValueError):
        return value
    return f if math.isfinite(f) else None


def _as_dict(obj) -> dict[str, Any]:
    if obj is None:
        return {}
    if hasattr(obj, "to_dict"):
        return obj.to_dict()
    if dataclasses.is_dataclass(obj):
        out = {}
        for f in dataclasses.fields(obj):
            v = getattr(obj, f.name)
            if isinstance(v, pd.DataFrame):
                continue
            out[f.name] = v
        return out
    return dict(obj)


def _alpha_given_sample(track_fits: pd.DataFrame) -> pd.DataFrame:
    """Report each track's alpha given the sample (empirical Bayes) as ``alpha``; keep its own as ``alpha_track``.

    A track of a few tens of positions barely constrains its own alpha (its interval often spans 0.3–1.7),
    so the reported ``alpha`` and its 95 % interval are the posterior under the distribution of alpha over all
    tracks of the sample (``classify._alpha_posterior``): short tracks borrow from the tracks like them, long
    tracks keep their own value, and a sample of several kinds of motion keeps several groups. The track's
    own estimate (noise- and blur-aware, from its steps alone) stays as ``alpha_track`` with its interval.
    Tracks without a posterior keep their own value in ``alpha``.
    """
    if "alpha_posterior" not in track_fits.columns or "alpha" not in track_fits.columns:
        return track_fits
    tf = track_fits.copy()
    own = ["alpha", "alpha_ci95_lo", "alpha_ci95_hi"]
    post = ["alpha_posterior", "alpha_posterior_ci95_lo", "alpha_posterior_ci95_hi"]
    for c in own:
        if c in tf.columns:
            tf[c.replace("alpha", "alpha_track", 1)] = tf[c]
    has = np.isfinite(tf["alpha_posterior"].to_numpy(float))
    for c_own, c_post in zip(own, post, strict=True):
        if c_own in tf.columns and c_post in tf.columns:
            tf[c_own] = np.where(has, tf[c_post].to_numpy(float), tf[c_own].to_numpy(float))
    return tf


#: Exposure / frame interval and in-exposure motion (RMS per axis, in spot SDs) from which a movie's D is
#: cautioned: on simulated 100 nm beads these read D 5-25 % low (README "From movie to D", "Cautions").
LONG_EXPOSURE_SHARE = 0.5
BLUR_SPOT_RATIO = 1.5


def exposure_caution(D_um2_s: float, *, exposure_s: float, frame_interval_s: float,
                     spot_sigma_um: float) -> str | None:
    """Return a caution when the exposure is long and particles move more than a spot width during it.

    Blurred spots of the fastest-moving moments are detected and localised less well than compact ones, so
    the detected positions under-represent motion during the exposure, and a track whose particle was missed
    is often joined to another spot; D reads low (on simulated 100 nm beads with the exposure equal to the
    frame interval: -5 % at 5000 photons, -12 % at 3000, -25 % at 600 with background 60; 25 ms of a 33 ms
    frame: -3 %). The caution is raised when ``exposure_s >= LONG_EXPOSURE_SHARE * frame_interval_s`` and
    the RMS displacement per axis during the exposure, ``sqrt(2 D t_E)``, is at least ``BLUR_SPOT_RATIO``
    spot SDs; ``None`` otherwise.
    """
    values = (D_um2_s, exposure_s, frame_interval_s, spot_sigma_um)
    if not all(v is not None and np.isfinite(v) for v in values):
        return None
    if frame_interval_s <= 0 or spot_sigma_um <= 0:
        return None
    if D_um2_s <= 0 or exposure_s < LONG_EXPOSURE_SHARE * frame_interval_s:
        return None
    blur_um = math.sqrt(2.0 * D_um2_s * exposure_s)
    ratio = blur_um / spot_sigma_um
    if ratio < BLUR_SPOT_RATIO:
        return None
    return (f"long exposure: {exposure_s * 1e3:.3g} ms of a {frame_interval_s * 1e3:.3g} ms frame, during "
            f"which particles move {blur_um:.2g} µm RMS per axis ({ratio:.1f} spot SDs); blurred spots are "
            "detected and localised selectively, so D may read low (5-25 % on simulated beads). Shorten the "
            "exposure to at most half the frame interval, or check with reference beads of similar size at "
            "these settings.")


def _with_min_points(tracks: pd.DataFrame, min_points: int, counts: np.ndarray | None = None):
    """Rows of tracks with at least ``min_points`` points (``counts``: each row's track length, if known)."""
    if counts is None:
        counts = tracks.groupby("track")["frame"].transform("size").to_numpy()
    return tracks[counts >= min_points].reset_index(drop=True)


def _sample_D_fit(tracks: pd.DataFrame, *, estimator: str, seed: int, fallback, **kw):
    """Sample fit of ``tracks`` (``fallback`` when no track has two steps between consecutive frames)."""
    from . import fit

    if tracks.empty:
        return fallback
    try:
        return fit.fit_sample(_in_track_frame_order(tracks), None, method=estimator, rng=seed, **kw)
    except FitError:
        return fallback


@keeps_freed_memory  # large temporaries reuse mapped pages (msdkit._memory): same numbers, less system time
def analyze_tracks(
    tracks: pd.DataFrame,
    *,
    frame_interval_s: float,
    exposure_s: float | None = None,
    temperature_c: float = 25.0,
    temperature_sd_c: float = 0.0,
    medium: Any = "water",
    wall_distance_um: float | None = None,
    n_dims: int = 2,
    estimator: str = "auto",
    max_lag_frames: int | None = None,
    drift_correction: bool = True,
    min_track_points: int | None = None,
    seed: int = 0,
    sizing_tracks: pd.DataFrame | None = None,
    step_limits: dict[str, Any] | None = None,
    sample_tracks: pd.DataFrame | None = None,
) -> AnalysisResult:
    """Analyse a track table: drift, MSD, D and alpha with intervals, motion classes, flags and sizes.

    Parameters
    ----------
    tracks : DataFrame
        Columns track, frame, x_um, y_um (time_s is recomputed from frame × frame_interval_s).
    frame_interval_s : float, s
    exposure_s : float, s, default=frame_interval_s
        Shutter-open time per frame (0 = instantaneous samples); sets the motion-blur coefficient.
    temperature_c : float, °C
    medium : "water", {"viscosity_mpa_s": ...} or another medium accepted by
        :func:`msdkit.hydro.medium_viscosity_mpa_s`.
    sizing_tracks : DataFrame, optional
        Tracks for the size distribution (default: the analysed tracks); may hold shorter tracks than
        ``min_track_points`` allows, since the size kernel takes each track's own length.
    step_limits : dict, optional
        ``max_step_um`` / ``step_loss_per_um2`` of the linking (:func:`msdkit.sizing.linking_step_limits`).
    sample_tracks : DataFrame, optional
        Tracks pooled into the sample D and its interval (default: the analysed tracks). Movies pass every
        track of ``analysis.sample_min_track_points`` (3) or more points: the long-track filter selects
        particles that stayed sharp and in focus and tracks lengthened by wrong joins, while short tracks
        carry most of the steps of fast, dim particles. The sample alpha and the sample flags come from the
        same tracks (tracks too short to classify count as undetermined); per-track fits and classes keep the
        analysed tracks.

    Returns
    -------
    AnalysisResult
    """
    from . import classify, drift, fit, hydro, msd, sizing

    if not frame_interval_s or frame_interval_s <= 0:
        raise InputError(expected_got("frame_interval_s", "> 0", frame_interval_s,
                                      "Set acquisition.frame_interval_s in the config."))
    exposure_s = frame_interval_s if exposure_s is None else float(exposure_s)
    tracks = _in_track_frame_order(tracks)
    time_s = tracks["frame"].to_numpy(float) * frame_interval_s
    # tables from msdkit's readers already hold exactly these times: writing the column again would copy every
    # float column of the table (copy-on-write), so it is set only when it differs
    if "time_s" not in tracks.columns or not np.array_equal(tracks["time_s"].to_numpy(), time_s):
        tracks["time_s"] = time_s
    del time_s
    if min_track_points:
        tracks = _with_min_points(tracks, min_track_points)
    ids = tracks["track"].to_numpy()
    n_tracks = int(np.count_nonzero(ids[1:] != ids[:-1])) + 1 if ids.size else 0  # rows in track order
    if n_tracks == 0:
        raise InputError("no tracks to analyse: every track was shorter than the minimum length or the table "
                         "was empty. Check detection/linking settings or lower analysis.min_track_points.")

    if sample_tracks is not None and len(sample_tracks) == len(tracks) and np.array_equal(
        np.unique(sample_tracks["track"].to_numpy()), np.unique(ids)
    ):
        sample_tracks = None  # the same tracks (no short ones, e.g. a 2D movie): nothing to fit twice

    viscosity_mpa_s = float(hydro.medium_viscosity_mpa_s(medium, temperature_c))

    beside = Beside(rows=len(tracks))
    # The stages that only read the tracks (step-model fits of the classes, size distribution, ensemble MSD)
    # run in a second thread beside the drift and the per-track fits when the process may use two
    # (msdkit._threads): the same computations, so the same numbers; with a limit of one thread each runs
    # here, in this order. With a second thread the step-model fits start before the drift is known, on the
    # tracks as they are: those are the fits the classes need when no drift is subtracted (the usual case);
    # otherwise they are fitted again on the corrected tracks (classify_tracks uses fits of exactly the
    # tracks it gets).
    step_fits = None
    early_stop = StopFlag()  # set when a drift is subtracted: the fits started ahead then stop where they are
    if beside.threaded:
        step_fits = beside.submit(classify.prepare_step_fits, tracks, frame_interval_s=frame_interval_s,
                                  exposure_s=exposure_s, stop=early_stop)
    with beside:  # an error here cancels what has not started and waits for what has
        drift_est = drift.estimate_drift(tracks, frame_interval_s=frame_interval_s)
        corrected = False
        if drift_correction and drift_est.worth_subtracting:
            early_stop.set()
            tracks = drift.remove_drift(tracks, drift_est)
            if sizing_tracks is not None:
                sizing_tracks = drift.remove_drift(sizing_tracks, drift_est)
            if sample_tracks is not None:
                sample_tracks = drift.remove_drift(sample_tracks, drift_est)
            corrected = True

    kw = dict(frame_interval_s=frame_interval_s, exposure_s=exposure_s, n_dims=n_dims)
    radius_kw = dict(temperature_c=temperature_c, viscosity_mpa_s=viscosity_mpa_s)
    size_kw = dict(frame_interval_s=frame_interval_s, exposure_s=exposure_s, n_dims=n_dims)

    def sizes():
        # the size kernel's σ: median of per-track estimates, robust to linking artefacts (sizing docs); on
        # movies spread over the tracks in proportion to their spot-fit precision
        # (sizing.precision_scaled_sd_um)
        step_sums = sizing.track_step_sums(tracks, n_dims=n_dims)  # one pass over the table for both calls
        table = tracks if sizing_tracks is None else sizing_tracks
        table_sums = step_sums if sizing_tracks is None else sizing.track_step_sums(table, n_dims=n_dims)
        sd = sizing.precision_scaled_sd_um(table, step_sums=table_sums, **size_kw)
        dist, _ = sizing.size_distribution_of_tracks(
            table, localization_sd_um=sd, wall_distance_um=wall_distance_um, rng=seed, **(step_limits or {}),
            **radius_kw, **size_kw, step_sums=table_sums)
        return step_sums, dist

    with beside:
        if step_fits is None or corrected:
            step_fits = beside.submit(classify.prepare_step_fits, tracks, frame_interval_s=frame_interval_s,
                                      exposure_s=exposure_s)
        sized = beside.submit(sizes)
        ens_msd = beside.submit(msd.ensemble_msd, tracks, frame_interval_s=frame_interval_s,
                                max_lag_frames=max_lag_frames)
        # per-track alpha borrows the sample's shared localisation error, fitted inside fit_tracks
        shared = fit._Shared(tracks, n_dims)  # steps and TA-MSD matrices computed once for both fits
        track_fits = fit.fit_tracks(tracks, method=estimator, _shared=shared, **kw)
        sample_fit = fit.fit_sample(tracks, track_fits, method=estimator, rng=seed, _shared=shared, **kw)
        del shared
        D_fit = sample_fit
        if sample_tracks is not None:
            D_fit = _sample_D_fit(sample_tracks, estimator=estimator, seed=seed, fallback=sample_fit, **kw)
        step_fits.result()

    classes = classify.classify_tracks(
        tracks, frame_interval_s=frame_interval_s, exposure_s=exposure_s,
        sigma_um=getattr(sample_fit, "sigma_um", None), track_fits=track_fits,
    )
    # The estimators' per-track alpha (noise- and blur-aware, shared localisation error) stays the `alpha`
    # column; the classifier's own model-comparison numbers are kept beside it with a `class_` prefix.
    renamed = {c: (c if c in ("track", "motion_class") or c not in track_fits.columns else f"class_{c}")
               for c in classes.columns}
    track_fits = track_fits.drop(columns=[c for c in ("motion_class",) if c in track_fits.columns])
    track_fits = track_fits.merge(classes.rename(columns=renamed), on="track", how="left")
    if sample_tracks is None or D_fit is sample_fit:  # no sample set, or none of its tracks was usable
        motion = classify.sample_motion(
            tracks, classes, sample_fit, drift_est, frame_interval_s=frame_interval_s, exposure_s=exposure_s,
            track_fits=track_fits,
        )
    else:
        # the sample's alpha, ergodicity and spread from every track of the sample set, as the sample D (long
        # tracks of a low-recall movie are mostly chains of wrong joins; see sample_tracks above); the class
        # fractions and the confined/directed flags count only the classified (analysed) tracks
        shortest = int(sample_tracks.groupby("track")["frame"].size().min()) if len(sample_tracks) else 3
        motion = classify.sample_motion(
            sample_tracks, classes, sample_fit, drift_est, frame_interval_s=frame_interval_s,
            exposure_s=exposure_s, track_fits=track_fits, min_points=max(3, shortest),
        )

    # the lag-1 size kernels use the Brownian step model's localisation error
    sigma = getattr(sample_fit, "D_sigma_um", getattr(sample_fit, "sigma_um", None))
    sigma = float(sigma) if sigma is not None and np.isfinite(sigma) and sigma > 0 else None
    step_sums, dist = sized.result()
    size_input = sizing.lag1_track_estimates(tracks, localization_sd_um=sigma, step_sums=step_sums, **size_kw)
    # per-track sizes with the short-track bias removed (Saxton 1997 χ² algebra; see sizing.track_sizes_nm)
    per_track = sizing.track_sizes_nm(size_input, wall_distance_um=wall_distance_um, **radius_kw, **size_kw)
    track_fits["radius_nm"] = track_fits["track"].map(per_track.set_index("track")["radius_nm"])
    track_fits = _alpha_given_sample(track_fits)
    ens = ens_msd.result()
    if max_lag_frames is None and len(ens):
        # auto: keep the lags that at least a tenth of the tracks (and at least 5) reach
        enough = ens["n_tracks"].to_numpy() >= max(5, 0.1 * n_tracks)
        ens = ens[np.cumprod(enough).astype(bool)].reset_index(drop=True) if enough[0] else ens.iloc[:1]

    sample_D = float(D_fit.D_um2_s)
    D_lo, D_hi = (float(v) for v in D_fit.D_ci95_um2_s)
    size = hydro.stokes_einstein_size(
        sample_D, D_ci95_um2_s=(D_lo, D_hi), temperature_c=temperature_c, temperature_sd_c=temperature_sd_c,
        medium=medium, wall_distance_um=wall_distance_um,
    )

    flags = list(motion.flags)
    drift_v = [float(v) for v in drift_est.velocity_um_s]
    summary: dict[str, Any] = {
        "D_um2_s": sample_D,
        "D_ci95_um2_s": [D_lo, D_hi],
        "alpha": float(getattr(motion, "alpha", sample_fit.alpha)),
        "alpha_ci95": [float(v) for v in getattr(motion, "alpha_ci95", sample_fit.alpha_ci95)],
        "radius_nm": size["radius_nm"],
        "radius_ci95_nm": size["radius_ci95_nm"],
        "diameter_nm": size["diameter_nm"],
        "diameter_ci95_nm": size["diameter_ci95_nm"],
        "n_tracks": n_tracks,
        "n_positions": int(len(tracks)),
        "flags": flags,
        "viscosity_mpa_s": viscosity_mpa_s,
        "temperature_c": float(temperature_c),
        "drift_um_s": drift_v,
        "drift_corrected": corrected,
        "localization_sd_um": _finite_or_none(getattr(sample_fit, "sigma_um", None)),
        "estimator": getattr(D_fit, "method", estimator),
        "n_tracks_D": int(getattr(D_fit, "n_tracks", n_tracks)),
        "frame_interval_s": frame_interval_s,
        "exposure_s": exposure_s,
        "motion": _as_dict(motion),
        "sample_fit": _as_dict(sample_fit),
        "sample_D_fit": _as_dict(D_fit),
        "size_distribution": dist.to_dict() if hasattr(dist, "to_dict") else {},
    }
    return AnalysisResult(
        tracks=tracks, track_fits=track_fits, ensemble_msd=ens, summary=summary,
        size_table=getattr(dist, "table", None),
    )


def _acquisition(cfg, metadata: dict[str, Any], path: Path) -> tuple[float | None, float, float]:
    acq = cfg.acquisition
    pixel = acq.pixel_size_um if acq.pixel_size_um is not None else metadata.get("pixel_size_um")
    dt = acq.frame_interval_s if acq.frame_interval_s is not None else metadata.get("frame_interval_s")
    if dt is None:
        raise InputError(
            f"{path.name}: the frame interval is unknown: neither acquisition.frame_interval_s in the config nor "
            "the file's metadata gives it. Set acquisition.frame_interval_s (seconds between frames)."
        )
    exposure = acq.exposure_s if acq.exposure_s is not None else metadata.get("exposure_s")
    if exposure is None or exposure > dt:
        exposure = dt
    return pixel, float(dt), float(exposure)


def movie_to_tracks(
    path: Path,
    cfg,
    *,
    progress: Callable[[int, int], None] | None = None,
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Detect and link particles in a movie, streaming it in chunks; return tracks in µm and the settings used."""
    from . import detect, link
    from .io.stacks import open_stack

    det, lnk = cfg.detection, cfg.linking
    with open_stack(path, channel=cfg.acquisition.channel) as stack:
        pixel, dt, exposure = _acquisition(cfg, stack.metadata, path)
        if pixel is None:
            raise InputError(
                f"{path.name}: the pixel size is unknown: neither acquisition.pixel_size_um in the config nor the "
                "file's OME metadata gives it. Set acquisition.pixel_size_um (µm per pixel)."
            )
        n_frames = stack.n_frames
        frame_shape = tuple(stack.frame_shape)
        sample_idx = np.unique(np.linspace(0, n_frames - 1, min(n_frames, 40)).astype(int))
        sample = np.stack([stack.read_frames(int(i), int(i) + 1)[0] for i in sample_idx])
        settings = detect.choose_detection_settings(
            sample, spot_diameter_px=det.spot_diameter_px, min_mass=det.min_mass,
            false_spots_per_frame=det.false_spots_per_frame, max_precision_px=det.max_precision_px,
            max_sigma_px=det.max_sigma_px,
        )
        chunks = []
        done = 0
        for first, frames in stack.iter_chunks(det.chunk_frames):
            chunks.append(detect.locate_spots(frames, settings=settings, first_frame=first))
            done += len(frames)
            if progress is not None:
                progress(done, n_frames)
    spots = pd.concat(chunks, ignore_index=True) if chunks else schema.empty_frame(schema.SPOT_COLUMNS)
    size_min_points = min(lnk.min_track_points, cfg.analysis.size_min_track_points,
                          cfg.analysis.sample_min_track_points)
    tracks_px, link_settings = link.link_spots(
        spots, max_step_px=lnk.max_step_px, max_gap_frames=lnk.max_gap_frames,
        min_track_points=size_min_points, frame_interval_s=dt, acceptance_sd=lnk.acceptance_sd,
        frame_shape=frame_shape,
    )
    tracks = pd.DataFrame({
        "track": tracks_px["track"].to_numpy(np.int64),
        "frame": tracks_px["frame"].to_numpy(np.int64),
        "time_s": tracks_px["frame"].to_numpy(float) * dt,
        "x_um": tracks_px["x_px"].to_numpy(float) * pixel,
        "y_um": tracks_px["y_px"].to_numpy(float) * pixel,
    })
    for extra in ("mass", "precision_px"):
        if extra in tracks_px.columns:
            tracks[extra if extra == "mass" else "precision_um"] = (
                tracks_px[extra].to_numpy(float) * (pixel if extra == "precision_px" else 1.0)
            )
    # short tracks serve the size distribution only; ids 0.. for the tracks the other stages analyse
    from .sizing import linking_step_limits

    counts = tracks.groupby("track")["frame"].transform("size").to_numpy()
    long_enough = counts >= lnk.min_track_points
    old_ids = tracks["track"].to_numpy()
    new_id = pd.Series(np.arange(np.unique(old_ids).size), index=np.unique(old_ids))
    order = np.r_[np.unique(old_ids[long_enough]), np.unique(old_ids[~long_enough])]
    new_id.loc[order] = np.arange(order.size)
    tracks["track"] = new_id.loc[old_ids].to_numpy()
    n_long = int(np.unique(old_ids[long_enough]).size)
    link_settings = dataclasses.replace(link_settings, min_track_points=lnk.min_track_points, n_tracks=n_long,
                                        n_spots_in_tracks=int(long_enough.sum()))
    area_um2 = frame_shape[0] * frame_shape[1] * pixel * pixel
    used = {
        "acquisition": {"pixel_size_um": pixel, "frame_interval_s": dt, "exposure_s": exposure},
        "detection": _as_dict(settings),
        "linking": _as_dict(link_settings),
        "n_frames": int(n_frames),
        "n_spots": int(len(spots)),
        "sizing": {
            "min_track_points": size_min_points,
            "n_tracks": int(np.unique(old_ids).size),
            **linking_step_limits(max_step_um=link_settings.max_step_px * pixel,
                                  spots_per_um2=len(spots) / max(n_frames, 1) / area_um2),
        },
    }
    return tracks, used


def _write_tables(stack_dir: Path, result: AnalysisResult, resolved: dict) -> None:
    """Write tracks.parquet, the CSV tables and resolved_config.yaml (each atomically)."""
    import yaml

    from .io.atomic import write_csv_atomic, write_parquet_atomic, write_text_atomic

    write_parquet_atomic(result.tracks[[*schema.TRACK_COLUMNS]], stack_dir / "tracks.parquet")
    fits = result.track_fits
    first = [c for c in schema.TRACK_FIT_COLUMNS_REQUIRED if c in fits.columns]
    write_csv_atomic(fits[first + [c for c in fits.columns if c not in first]], stack_dir / "track_fits.csv")
    ens = result.ensemble_msd
    lead = ["lag_s", "msd_um2", "sem_um2", "n_tracks"]
    write_csv_atomic(ens[lead + [c for c in ens.columns if c not in lead]], stack_dir / "msd_ensemble.csv")
    if result.size_table is not None:
        write_csv_atomic(result.size_table, stack_dir / "size_distribution.csv")
    write_text_atomic(yaml.safe_dump(resolved, sort_keys=False, allow_unicode=True),
                      stack_dir / "resolved_config.yaml")


def _write_figures(stack_dir: Path, result: AnalysisResult) -> None:
    try:
        from .report.figures import write_stack_figures

        write_stack_figures(stack_dir, result)
    except Exception as exc:  # a figure must never cost the numbers
        log.warning("%s: figures not written: %s", stack_dir.name, exc)


def _write_outputs(stack_dir: Path, result: AnalysisResult, summary: dict[str, Any], resolved: dict) -> None:
    """Write one input's folder; summary.json last, so that a complete summary means complete outputs.

    The tables are written on a second thread while this one draws the figures, when the process may use
    two (:func:`msdkit._threads.analysis_threads`; worker processes of a batch use one): pyarrow encodes,
    compresses and formats with the GIL released, matplotlib draws with it held. A failing table write
    is raised here after the figures are done; a failing figure is logged and never costs the tables.
    """
    from ._threads import analysis_threads
    from .io.atomic import write_json_atomic

    stack_dir.mkdir(parents=True, exist_ok=True)
    if analysis_threads() > 1:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="msdkit-write") as pool:
            tables = pool.submit(_write_tables, stack_dir, result, resolved)
            _write_figures(stack_dir, result)
            tables.result()
    else:
        _write_tables(stack_dir, result, resolved)
        _write_figures(stack_dir, result)
    write_json_atomic(summary, stack_dir / "summary.json")


#: Modules every input needs after its file is read, in the order the stages need them: imported ahead by
#: :func:`import_ahead` while the file is read.
AHEAD_MODULES = ("msdkit._msd_kernels", "msdkit.drift", "msdkit.msd", "msdkit.fit",
                 "msdkit.motion_models", "msdkit.classify", "msdkit.sizing", "matplotlib.figure",
                 "matplotlib.backends.backend_agg", "msdkit.report.figures")
#: Names of the modules among them that only the figures need (written after the analysis).
FIGURE_MODULE_PREFIXES = ("matplotlib", "msdkit.report")
_ahead_lock = threading.Lock()
_ahead_thread: threading.Thread | None = None
_analysis_modules_loaded = threading.Event()


def _import_all(names, analysis_loaded: threading.Event | None = None) -> None:
    """Import ``names`` in order; set ``analysis_loaded`` before the first figure module (or at the end)."""
    import importlib

    try:
        for name in names:
            if analysis_loaded is not None and name.startswith(FIGURE_MODULE_PREFIXES):
                analysis_loaded.set()
            try:
                module = importlib.import_module(name)
                if name == "msdkit._msd_kernels":  # numba's first cached kernel loads its code generator
                    module.scan_order(np.zeros(2, np.int64), np.zeros(2, np.int64))
            except Exception:  # noqa: BLE001  (the stage that needs the module imports it again and reports)
                log.debug("importing %s ahead failed", name, exc_info=True)
    finally:
        if analysis_loaded is not None:
            analysis_loaded.set()


def import_ahead() -> threading.Thread | None:
    """Import the analysis and figure modules on a background thread, once per process.

    A fresh process spends seconds importing (scipy's parts, matplotlib, numba and its first cached kernel),
    almost all of it holding the GIL; reading a track table (pyarrow) and hashing it mostly do not.
    :func:`process_input` starts this right before reading a table, so the imports run while the file is
    read. The analysis modules come first: the stages start when they are loaded
    (:func:`wait_for_analysis_modules`), while the thread goes on with the figure modules (matplotlib: 0.5 s,
    needed only when the outputs are written; it shares no module with the stages' imports that is not loaded
    by then, so neither waits for the other's imports); the outputs wait for the whole thread. Nothing is
    started when the process may use only one thread (:func:`msdkit._threads.analysis_threads`: worker
    processes of a batch) or when every module is already loaded. Returns the thread (or None).
    """
    global _ahead_thread
    import sys

    from ._threads import analysis_threads

    with _ahead_lock:
        if _ahead_thread is not None:
            return _ahead_thread
        missing = [m for m in AHEAD_MODULES if m not in sys.modules]
        if not missing or analysis_threads() < 2:
            return None
        _ahead_thread = threading.Thread(target=_import_all, args=(missing, _analysis_modules_loaded),
                                         name="msdkit-import", daemon=True)
        _ahead_thread.start()
        return _ahead_thread


def wait_for_analysis_modules(ahead: threading.Thread | None) -> None:
    """Wait until the thread of :func:`import_ahead` has loaded the stages' modules (not the figures')."""
    if ahead is not None:
        _analysis_modules_loaded.wait()


def process_input(
    input_path: Path,
    cfg,
    stack_dir: Path,
    *,
    stack_name: str,
    progress: Callable[[int, int], None] | None = None,
) -> InputOutcome:
    """Run one input (movie or track table) through every stage and write its folder of results.

    Raises on failure (the batch records the error and goes on with the other inputs).
    """
    from .config import config_hash
    from .io.atomic import file_sha256

    input_path = Path(input_path)
    if not input_path.exists():
        raise InputError(f"{input_path}: input file not found. Check the inputs list and the config's folder.")
    ahead = None
    if input_path.suffix.lower() in TABLE_SUFFIXES:
        from .io.tables import read_track_table

        dt = cfg.acquisition.frame_interval_s
        if dt is None:
            raise InputError(f"{input_path.name}: a track table needs acquisition.frame_interval_s in the config.")
        ahead = import_ahead()
        t_read = time.perf_counter()
        tracks = read_track_table(input_path, pixel_size_um=cfg.acquisition.pixel_size_um, frame_interval_s=dt)
        log.info("%s: read %d positions in %.2f s", stack_name, len(tracks), time.perf_counter() - t_read)
        wait_for_analysis_modules(ahead)  # the figure modules go on loading beside the first stages
        exposure = cfg.acquisition.exposure_s if cfg.acquisition.exposure_s is not None else dt
        used: dict[str, Any] = {"acquisition": {"pixel_size_um": cfg.acquisition.pixel_size_um,
                                                "frame_interval_s": dt, "exposure_s": exposure}}
    else:
        tracks, used = movie_to_tracks(input_path, cfg, progress=progress)
    acq = used["acquisition"]
    an, smp = cfg.analysis, cfg.sample
    sizing_tracks, step_limits, sample_tracks = None, None, None
    if "sizing" in used:  # a movie: short tracks were kept for the size distribution and the sample D
        counts = tracks.groupby("track")["frame"].transform("size").to_numpy()  # once for the three sets
        sizing_tracks = _with_min_points(tracks, an.size_min_track_points, counts)
        sample_tracks = _with_min_points(tracks, an.sample_min_track_points, counts)
        tracks = _with_min_points(tracks, cfg.linking.min_track_points, counts)
        step_limits = {k: used["sizing"][k] for k in ("max_step_um", "step_loss_per_um2")}
    t_analysis = time.perf_counter()
    result = analyze_tracks(
        tracks, frame_interval_s=acq["frame_interval_s"], exposure_s=acq["exposure_s"],
        temperature_c=smp.temperature_c, temperature_sd_c=smp.temperature_sd_c,
        medium=smp.medium.model_dump() if hasattr(smp.medium, "model_dump") else smp.medium,
        wall_distance_um=smp.wall_distance_um, n_dims=an.n_dims, estimator=an.estimator,
        max_lag_frames=an.max_lag_frames, drift_correction=an.drift_correction,
        min_track_points=an.min_track_points, seed=an.seed, sizing_tracks=sizing_tracks,
        step_limits=step_limits, sample_tracks=sample_tracks,
    )
    provenance = {
        "msdkit_version": __version__,
        "config_hash": config_hash(cfg),
        "input_file": str(input_path),
        "input_sha256": file_sha256(input_path),
    }
    cautions = []
    if "detection" in used:  # a movie: motion blur against the spot size
        caution = exposure_caution(
            float(result.summary["D_um2_s"]), exposure_s=float(acq["exposure_s"]),
            frame_interval_s=float(acq["frame_interval_s"]),
            spot_sigma_um=float(used["detection"]["spot_sigma_px"]) * float(acq["pixel_size_um"]),
        )
        if caution:
            cautions.append(caution)
            warnings.warn(caution, UserWarning, stacklevel=2)
    summary = {**result.summary, "stack": stack_name, "cautions": cautions, "settings_used": used,
               "provenance": provenance}
    summary = _jsonable(summary)
    resolved = cfg.model_dump(mode="json")
    resolved["acquisition"] = {**resolved["acquisition"], **acq}
    resolved["chosen_automatically"] = _jsonable({k: v for k, v in used.items() if k != "acquisition"})
    resolved["provenance"] = provenance
    t_outputs = time.perf_counter()
    log.info("%s: analysed in %.2f s", stack_name, t_outputs - t_analysis)
    if ahead is not None:
        ahead.join()  # the figure modules: loaded beside the analysis
    _write_outputs(stack_dir, result, summary, resolved)
    log.info("%s: outputs written in %.2f s", stack_name, time.perf_counter() - t_outputs)
    s = result.summary
    return InputOutcome(
        stack=stack_name, status="ok", error="", n_tracks=int(s["n_tracks"]), D_um2_s=float(s["D_um2_s"]),
        alpha=float(s["alpha"]), radius_nm=float(s["radius_nm"] if s["radius_nm"] is not None else math.nan),
        flags=list(s["flags"]),
        extra={
            "D_ci95_lo_um2_s": s["D_ci95_um2_s"][0], "D_ci95_hi_um2_s": s["D_ci95_um2_s"][1],
            "diameter_nm": s["diameter_nm"], "localization_sd_um": s["localization_sd_um"],
            "viscosity_mpa_s": s["viscosity_mpa_s"], "temperature_c": s["temperature_c"],
        },
    )


def _jsonable(obj):
    """Convert numpy scalars/arrays and non-finite floats into JSON-safe values (NaN → None)."""
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_jsonable(v) for v in obj.tolist()]
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, pd.DataFrame):
        return None
    return obj
