"""Table schemas: column names and dtypes of every table msdkit reads or writes.

Readers, writers, stages and tests all use these constants, so a column is named in exactly one place.

Coordinate convention (used everywhere): x is the image column, y is the image row, and the origin is the
centre of pixel (0, 0); positions in micrometres are ``x_um = x_px * pixel_size_um``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .errors import InputError, expected_got

#: Spots found by detection, one row per spot.
SPOT_COLUMNS: dict[str, str] = {
    "frame": "int64",
    "x_px": "float64",
    "y_px": "float64",
    "mass": "float64",  # integrated brightness above background (camera counts)
    "signal": "float64",  # peak brightness above background (camera counts)
    "size_px": "float64",  # radius of gyration of the spot
    "precision_px": "float64",  # estimated localisation SD per axis
}

#: Minimal track table (input contract): one row per detected position.
TRACK_INPUT_COLUMNS_UM = ("track", "frame", "x_um", "y_um")
TRACK_INPUT_COLUMNS_PX = ("track", "frame", "x_px", "y_px")

#: Tracks as msdkit holds them internally and writes them to tracks.parquet.
TRACK_COLUMNS: dict[str, str] = {
    "track": "int64",
    "frame": "int64",
    "time_s": "float64",
    "x_um": "float64",
    "y_um": "float64",
}

#: Time-averaged MSD per track (long format).
TA_MSD_COLUMNS: dict[str, str] = {
    "track": "int64",
    "lag_frames": "int64",
    "msd_um2": "float64",
    "n_pairs": "int64",
}

#: Ensemble MSD of a sample (msd_ensemble.csv); the first four columns are the output contract.
ENSEMBLE_MSD_COLUMNS: dict[str, str] = {
    "lag_s": "float64",
    "msd_um2": "float64",
    "sem_um2": "float64",
    "n_tracks": "int64",
    "lag_frames": "int64",
    "n_pairs": "int64",
    "ta_msd_um2": "float64",
}

#: Per-track results (track_fits.csv); the first six columns are the output contract.
TRACK_FIT_COLUMNS_REQUIRED = ("track", "n_points", "D_um2_s", "alpha", "radius_nm", "motion_class")

#: Batch summary (batch_summary.csv); these columns are the output contract, more may follow.
BATCH_SUMMARY_COLUMNS = ("stack", "status", "error", "n_tracks", "D_um2_s", "alpha", "radius_nm", "flags")

#: Motion classes a track can get.
MOTION_CLASSES = (
    "normal",
    "subdiffusive",
    "superdiffusive",
    "confined",
    "directed",
    "immobile",
    "undetermined",
)


def empty_frame(columns: dict[str, str]) -> pd.DataFrame:
    """Return an empty DataFrame with the given columns and dtypes."""
    return pd.DataFrame({name: pd.Series(dtype=dtype) for name, dtype in columns.items()})


def coerce(df: pd.DataFrame, columns: dict[str, str]) -> pd.DataFrame:
    """Cast the named columns to their schema dtypes (other columns are kept as they are)."""
    out = df.copy()
    for name, dtype in columns.items():
        if name in out.columns:
            out[name] = out[name].astype(np.dtype(dtype))
    return out


def position_columns(tracks: pd.DataFrame) -> tuple[str, ...]:
    """Position columns of a track table in µm: x_um, y_um (and z_um when present)."""
    return ("x_um", "y_um", "z_um") if "z_um" in tracks.columns else ("x_um", "y_um")


def check_track_table(tracks, frame_interval_s) -> tuple[str, ...]:
    """Validate a track table and frame interval at a stage's public boundary; return its position columns.

    Raises
    ------
    InputError
        When ``tracks`` is not a DataFrame, lacks track/frame/x_um/y_um, or the frame interval is not > 0.
    """
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
    return position_columns(tracks)
