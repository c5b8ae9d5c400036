"""Track tables from CSV or Parquet: validated, converted to micrometres and sorted.

A track table has one row per position with the columns ``track, frame, x_um, y_um`` (or ``x_px, y_px`` with a
pixel size). Column names are matched without regard to case, spaces or brackets, so ``X (µm)`` is read as
``x_um``; a few common names for the track column (``particle``, ``track_id``, ``trajectory``) and for the
frame column (``frame_index``, ``frame_number``) are accepted too. Names without a unit (``x``, ``y``) are
refused because pixels and micrometres cannot be told apart.

The reader is vectorised end to end (pyarrow parse, numpy checks and sort), so a table of ten million
positions is read in seconds.
"""

from __future__ import annotations

import csv
import gzip
import io
import math
import re
from pathlib import Path

import numpy as np
import pandas as pd

from .._memory import keeps_freed_memory
from ..errors import InputError, expected_got
from ..schema import TRACK_COLUMNS

#: File name endings read as comma/tab/semicolon-separated text, and as Parquet.
CSV_SUFFIXES = (".csv", ".tsv", ".txt", ".csv.gz", ".tsv.gz")
PARQUET_SUFFIXES = (".parquet", ".pq")

# Normalised column name -> canonical column. Normalisation: lower case, µ/μ -> u, any run of characters
# other than letters and digits -> "_", leading/trailing "_" removed.
_ALIASES: dict[str, str] = {
    **{k: "track" for k in ("track", "track_id", "trackid", "track_no", "track_number", "particle",
                            "particle_id", "trajectory", "trajectory_id", "traj", "traj_id")},
    **{k: "frame" for k in ("frame", "frame_index", "frame_id", "frame_no", "frame_number", "frame_nr")},
    **{k: "x_um" for k in ("x_um", "x_micron", "x_microns", "x_micrometer", "x_micrometre", "x_micrometers",
                           "x_micrometres", "position_x_um", "pos_x_um")},
    **{k: "y_um" for k in ("y_um", "y_micron", "y_microns", "y_micrometer", "y_micrometre", "y_micrometers",
                           "y_micrometres", "position_y_um", "pos_y_um")},
    **{k: "x_px" for k in ("x_px", "x_pix", "x_pixel", "x_pixels", "position_x_px", "pos_x_px")},
    **{k: "y_px" for k in ("y_px", "y_pix", "y_pixel", "y_pixels", "position_y_px", "pos_y_px")},
}
_UNITLESS = {"x", "y", "pos_x", "pos_y", "position_x", "position_y", "x_position", "y_position"}


def _normalise(name: str) -> str:
    s = name.strip().lower().replace("µ", "u").replace("μ", "u")
    return re.sub(r"[^a-z0-9]+", "_", s).strip("_")


def _suffix(path: Path) -> str:
    name = path.name.lower()
    for suf in (*CSV_SUFFIXES, *PARQUET_SUFFIXES):
        if name.endswith(suf):
            return suf
    return path.suffix.lower()


def _read_header(path: Path, suffix: str) -> tuple[list[str], str, str]:
    """Return (column names, delimiter, encoding) from the first line of a text table."""
    opener = gzip.open if suffix.endswith(".gz") else open
    try:
        with opener(path, "rb") as fh:
            raw = fh.readline(1 << 20)
    except (OSError, EOFError) as exc:
        raise InputError(
            f"{path.name}: cannot read the file: {exc}. Check that it is a complete text table."
        ) from None
    if not raw.strip():
        raise InputError(
            f"{path.name}: the track table is empty; expected a header line with track, frame, x_um, y_um "
            "and one row per position."
        )
    encoding = "utf-8"
    try:
        line = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        encoding = "latin-1"
        line = raw.decode("latin-1")
    if "\0" in line:
        raise InputError(
            f"{path.name}: this is not a text table (it contains binary data); expected a CSV file with a "
            "header line track, frame, x_um, y_um. Check that the file has the right ending."
        )
    if suffix.startswith(".tsv"):
        delim = "\t"
    else:
        counts = {d: line.count(d) for d in (",", "\t", ";")}
        delim = max(counts, key=counts.get) if max(counts.values()) > 0 else ","
    names = next(csv.reader(io.StringIO(line), delimiter=delim))
    return [n.strip() for n in names], delim, encoding


def _match_columns(names: list[str], path: Path) -> dict[str, str]:
    """Map canonical column -> column name in the file; refuse ambiguous or missing columns."""
    found: dict[str, list[str]] = {}
    for name in names:
        canon = _ALIASES.get(_normalise(name))
        if canon is not None:
            found.setdefault(canon, []).append(name)
    for canon, cols in found.items():
        if len(cols) > 1:
            raise InputError(
                f"{path.name}: columns {', '.join(map(repr, cols))} all mean {canon!r}; expected exactly "
                "one. Rename or remove the extra columns."
            )
    mapping = {canon: cols[0] for canon, cols in found.items()}
    has_um = "x_um" in mapping and "y_um" in mapping
    has_px = "x_px" in mapping and "y_px" in mapping
    needed = ["track", "frame"] + (["x_um", "y_um"] if has_um or not has_px else ["x_px", "y_px"])
    missing = [c for c in needed if c not in mapping]
    if missing:
        unitless = [n for n in names if _normalise(n) in _UNITLESS]
        hint = (
            f" Columns {', '.join(map(repr, unitless))} have no unit: rename them x_um, y_um (micrometres) "
            "or x_px, y_px (pixels, with acquisition.pixel_size_um set)."
            if unitless
            else " Rename the columns or export the table with these names."
        )
        shown = ", ".join(map(repr, names[:12])) + (" …" if len(names) > 12 else "")
        raise InputError(
            f"{path.name}: missing column(s) {', '.join(missing)}; expected track, frame, x_um, y_um "
            f"(or x_px, y_px with a pixel size); got columns {shown}.{hint}"
        )
    return {c: mapping[c] for c in needed}


def _arrow_csv(path: Path, cols: list[str], delim: str, encoding: str, *, as_text: bool = False):
    import pyarrow as pa
    import pyarrow.csv as pacsv

    convert = pacsv.ConvertOptions(
        include_columns=cols,
        column_types={c: pa.string() for c in cols} if as_text else None,
        strings_can_be_null=True,
    )
    return pacsv.read_csv(
        path,
        read_options=pacsv.ReadOptions(encoding=encoding),
        parse_options=pacsv.ParseOptions(delimiter=delim),
        convert_options=convert,
    )


def _first_bad_text(path: Path, cols: list[str], delim: str, encoding: str, mapping: dict[str, str]) -> str:
    """After a failed typed parse, find the first value that is not a number (slow path, errors only)."""
    table = _arrow_csv(path, cols, delim, encoding, as_text=True)
    for canon, name in mapping.items():
        if canon == "track":
            continue
        text = table.column(name).to_pandas()
        num = pd.to_numeric(text, errors="coerce")
        bad = np.flatnonzero(num.isna().to_numpy() & text.notna().to_numpy())
        if bad.size:
            return (
                f"column {name!r} must hold numbers; got {text.iloc[bad[0]]!r} in data row {bad[0] + 1} "
                f"({bad.size} non-numeric value(s) in total)"
            )
    return "a value could not be parsed"


def _load_arrow(path: Path, suffix: str):
    """Read only the needed columns with pyarrow; return (table, mapping canonical -> file column)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    if suffix in PARQUET_SUFFIXES:
        try:
            names = pq.read_schema(path).names
        except (pa.ArrowException, OSError) as exc:
            raise InputError(
                f"{path.name}: not a readable Parquet file ({exc}); expected a Parquet track table. "
                "Check that the file is complete and was written as Parquet."
            ) from None
        mapping = _match_columns(names, path)
        try:
            return pq.read_table(path, columns=list(mapping.values())), mapping
        except (pa.ArrowException, OSError) as exc:
            raise InputError(
                f"{path.name}: the Parquet file cannot be read ({exc}). Re-export the table."
            ) from None

    names, delim, encoding = _read_header(path, suffix)
    mapping = _match_columns(names, path)
    cols = list(mapping.values())
    try:
        return _arrow_csv(path, cols, delim, encoding), mapping
    except pa.ArrowInvalid as exc:
        if "conversion error" in str(exc).lower() or "invalid value" in str(exc).lower():
            detail = _first_bad_text(path, cols, delim, encoding, mapping)
        else:
            detail = str(exc).splitlines()[0]
        raise InputError(f"{path.name}: {detail}. Fix or remove the row(s) and run again.") from None


def _column(table, name: str, canon: str, path: Path, *, integer: bool, row_offset: int = 0) -> np.ndarray:
    """One column as a numpy array, validated; ``row_offset`` numbers the rows of a part of the file."""
    import pyarrow as pa
    import pyarrow.compute as pc

    col = table.column(name)
    if col.null_count:
        first = int(np.flatnonzero(pc.is_null(col, nan_is_null=True).to_numpy(zero_copy_only=False))[0])
        raise InputError(
            f"{path.name}: column {name!r} has {col.null_count} empty or NaN value(s) (first in data row "
            f"{row_offset + first + 1}); expected a value in every row. Remove incomplete rows before "
            "analysis."
        )
    typ = col.type
    is_text = pa.types.is_string(typ) or pa.types.is_large_string(typ)
    if canon == "track" and (is_text or pa.types.is_dictionary(typ)):
        codes, _ = pd.factorize(col.to_pandas(), sort=True)
        return codes.astype(np.int64)
    if is_text:
        text = col.to_pandas()
        num = pd.to_numeric(text, errors="coerce")
        bad = np.flatnonzero(num.isna().to_numpy())
        if bad.size:
            raise InputError(
                f"{path.name}: column {name!r} must hold numbers; got {text.iloc[bad[0]]!r} in data row "
                f"{bad[0] + 1} ({bad.size} non-numeric value(s) in total). Fix or remove those rows."
            )
        col = pa.chunked_array([pa.array(num.to_numpy())])
        typ = col.type
    if not (pa.types.is_integer(typ) or pa.types.is_floating(typ)):
        raise InputError(
            f"{path.name}: column {name!r} must hold numbers; got values of type {typ}. "
            "Export the table with numeric columns."
        )
    values = col.to_numpy()
    if pa.types.is_floating(typ):
        values = values.astype(np.float64, copy=False)
        bad = ~np.isfinite(values)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(
                f"{path.name}: column {name!r} has {int(bad.sum())} NaN or infinite value(s) (first in data "
                f"row {row_offset + i + 1}: {values[i]}); expected finite numbers. Remove those rows before "
                "analysis."
            )
        if integer:
            frac = values != np.round(values)
            if frac.any():
                i = int(np.flatnonzero(frac)[0])
                fix = ("Give frame indices (0, 1, 2, …), not times." if canon == "frame"
                       else "Give each track a whole-number or text identifier.")
                raise InputError(
                    f"{path.name}: column {name!r} must hold whole numbers; got {values[i]} in data row "
                    f"{row_offset + i + 1}. {fix}"
                )
            return values.astype(np.int64)
        return values
    return values.astype(np.int64 if integer else np.float64, copy=False)


def _parquet_streamed(path: Path) -> tuple[dict[str, np.ndarray], dict[str, str]] | None:
    """Numeric columns of a Parquet table, read one row group at a time into arrays of the final size.

    Peak memory is the result plus one row group, instead of the whole Arrow table beside its numpy copy.
    None when a needed column is not numeric (text track labels need the whole column at once).
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        pf = pq.ParquetFile(path)
        schema = pf.schema_arrow
    except (pa.ArrowException, OSError) as exc:
        raise InputError(
            f"{path.name}: not a readable Parquet file ({exc}); expected a Parquet track table. "
            "Check that the file is complete and was written as Parquet."
        ) from None
    mapping = _match_columns(schema.names, path)
    for name in mapping.values():
        typ = schema.field(name).type
        if not (pa.types.is_integer(typ) or pa.types.is_floating(typ)):
            return None
    n = pf.metadata.num_rows
    out = {c: np.empty(n, np.int64 if c in ("track", "frame") else np.float64) for c in mapping}
    pos = 0
    try:
        for i in range(pf.num_row_groups):
            part = pf.read_row_group(i, columns=list(mapping.values()))
            m = part.num_rows
            for canon, name in mapping.items():
                integer = canon in ("track", "frame")
                out[canon][pos : pos + m] = _column(part, name, canon, path, integer=integer, row_offset=pos)
            pos += m
            del part
    except (pa.ArrowException, OSError) as exc:
        raise InputError(
            f"{path.name}: the Parquet file cannot be read ({exc}). Re-export the table."
        ) from None
    if pos != n:
        raise InputError(f"{path.name}: the Parquet file holds {pos} rows where its footer says {n}. "
                         "Re-export the table.")
    return out, mapping


# The table's new arrays (hundreds of MB for 10 M rows) are filled once: with numpy's huge-page advice on, the
# kernel assembles and zeroes 2 MB pages for them first (20,000 x 500 rows in a fresh process: 1.5-1.9 s, of
# which 0.9-1.3 s system time, against 0.55-0.8 s without; msdkit._memory). Same values either way.
@keeps_freed_memory
def read_track_table(
    path: str | Path,
    *,
    pixel_size_um: float | None = None,
    frame_interval_s: float,
) -> pd.DataFrame:
    """Read a track table from CSV or Parquet into msdkit's track schema.

    Parameters
    ----------
    path : str or Path
        ``.csv`` / ``.tsv`` / ``.txt`` (optionally ``.gz``) or ``.parquet`` / ``.pq``. Columns ``track, frame,
        x_um, y_um``, or ``x_px, y_px`` (converted with ``pixel_size_um``). Other columns are ignored. Track
        identifiers may be integers or text (text labels are numbered in sorted order).
    pixel_size_um : float, µm per pixel, optional
        Needed only when positions are in pixels.
    frame_interval_s : float, s
        Time between frames; ``time_s = frame * frame_interval_s``.

    Returns
    -------
    DataFrame
        Columns of :data:`msdkit.schema.TRACK_COLUMNS` (``track, frame, time_s, x_um, y_um``), sorted by track
        then frame, with a fresh RangeIndex.

    Raises
    ------
    InputError
        Missing or ambiguous columns (the message names them and what is expected), non-numeric, empty, NaN or
        infinite values, non-integer or negative frames, duplicate (track, frame) rows, an unknown file type,
        a missing pixel size for pixel positions, or a missing/invalid frame interval.
    """
    path = Path(path)
    if frame_interval_s is None or not (math.isfinite(frame_interval_s) and frame_interval_s > 0):
        raise InputError(expected_got(
            f"{path.name}: frame_interval_s", "a number > 0 (seconds between frames)", frame_interval_s,
            "Set acquisition.frame_interval_s in the config.",
        ))
    if not path.is_file():
        raise InputError(f"{path}: track table not found. Check the inputs list and the config's folder.")
    suffix = _suffix(path)
    if suffix not in CSV_SUFFIXES + PARQUET_SUFFIXES:
        raise InputError(expected_got(
            f"{path.name}: the track table type", "one of " + ", ".join(CSV_SUFFIXES + PARQUET_SUFFIXES),
            repr(suffix or "(no ending)"), "Export the table as CSV or Parquet.",
        ))

    streamed = _parquet_streamed(path) if suffix in PARQUET_SUFFIXES else None
    if streamed is not None:
        cols, mapping = streamed
        if cols["track"].size == 0:
            raise InputError(
                f"{path.name}: the track table has a header but no rows; expected one row per position."
            )
        track, frame = cols["track"], cols["frame"]
    else:
        table, mapping = _load_arrow(path, suffix)
        if table.num_rows == 0:
            raise InputError(
                f"{path.name}: the track table has a header but no rows; expected one row per position."
            )
        cols = {canon: _column(table, name, canon, path, integer=canon in ("track", "frame"))
                for canon, name in mapping.items()}
        del table
        track, frame = cols["track"], cols["frame"]
    if "x_um" in mapping:
        x, y = cols["x_um"], cols["y_um"]
    else:
        if pixel_size_um is None or not (math.isfinite(pixel_size_um) and pixel_size_um > 0):
            raise InputError(expected_got(
                f"{path.name}: pixel_size_um (positions are in pixels: {mapping['x_px']}, {mapping['y_px']})",
                "a number > 0 (µm per pixel)", pixel_size_um,
                "Set acquisition.pixel_size_um in the config, or give positions as x_um, y_um.",
            ))
        x, y = cols["x_px"] * float(pixel_size_um), cols["y_px"] * float(pixel_size_um)
    del cols

    if frame.min() < 0:
        i = int(np.argmin(frame))
        raise InputError(
            f"{path.name}: column {mapping['frame']!r} must hold frame indices >= 0; got {frame[i]} in data "
            f"row {i + 1}. Number frames from 0 (or 1) upwards."
        )

    # Sort by (track, frame) unless already sorted (common for exported tables; saves the lexsort).
    from .._msd_kernels import scan_order

    already = len(track) < 2 or scan_order(track, frame)[0] == 0  # one compiled pass, no temporaries
    if not already:
        # One int64 key per row sorts ~4x faster than a two-key lexsort; fall back when the ranges are huge.
        t_min, t_span = int(track.min()), int(track.max()) - int(track.min()) + 1
        f_span = int(frame.max()) + 1
        if t_span < (1 << 62) // f_span:
            order = np.argsort((track - t_min) * f_span + frame)
        else:
            order = np.lexsort((frame, track))
        track, frame, x, y = track[order], frame[order], x[order], y[order]
        same = (track[1:] == track[:-1]) & (frame[1:] == frame[:-1])
        if same.any():
            i = int(np.flatnonzero(same)[0])
            raise InputError(
                f"{path.name}: {int(same.sum())} duplicate (track, frame) row(s), e.g. track {track[i]} "
                f"frame {frame[i]}; expected at most one position per track and frame. Remove the "
                "duplicates or give the tracks distinct identifiers."
            )
    out = pd.DataFrame({
        "track": track,
        "frame": frame,
        "time_s": frame.astype(np.float64) * float(frame_interval_s),
        "x_um": np.asarray(x, dtype=np.float64),
        "y_um": np.asarray(y, dtype=np.float64),
    }, copy=False)  # the arrays are ours: no second copy of the table
    return out[list(TRACK_COLUMNS)]
