"""Reading movies: multi-page TIFF, OME-TIFF, ImageJ hyperstacks and folders of single-image TIFFs.

:func:`open_stack` returns a :class:`StackReader` that reads frames on demand, so memory is bounded by the
frames asked for, not by the movie. Acquisition metadata (pixel size, frame interval, exposure) is taken from
OME-XML or ImageJ tags when present. Every problem with the file raises :class:`msdkit.errors.InputError`
with the one message template: what was wrong, what was expected, what was got, what to do.

Frames are returned as float32 arrays of shape (n, ny, nx): x is the column, y the row (see
:mod:`msdkit.schema`).
"""

from __future__ import annotations

import logging
import math
import re
import struct
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError, expected_got

_TIFF_SUFFIXES = (".tif", ".tiff")

#: Length units (OME UnitsLength symbols and ImageJ spellings) in µm.
_LENGTH_UM = {
    "m": 1e6,
    "cm": 1e4,
    "mm": 1e3,
    "µm": 1.0,
    "μm": 1.0,
    "um": 1.0,
    "micron": 1.0,
    "microns": 1.0,
    "micrometer": 1.0,
    "micrometre": 1.0,
    "\\u00b5m": 1.0,
    "nm": 1e-3,
    "nanometer": 1e-3,
    "pm": 1e-6,
    "å": 1e-4,
    "Å": 1e-4,
    "angstrom": 1e-4,
}
#: Time units (OME UnitsTime symbols and ImageJ spellings) in s.
_TIME_S = {
    "s": 1.0,
    "sec": 1.0,
    "second": 1.0,
    "seconds": 1.0,
    "ms": 1e-3,
    "msec": 1e-3,
    "µs": 1e-6,
    "μs": 1e-6,
    "us": 1e-6,
    "\\u00b5s": 1e-6,
    "ns": 1e-9,
    "min": 60.0,
    "h": 3600.0,
    "hr": 3600.0,
}
#: tifffile log messages that mean the file ends early or its structure is broken.
_DAMAGE_SIGNS = (
    "invalid page offset",
    "corrupted",
    "invalid value offset",
    "failed to reshape",
    "metadata invalid",
    "truncated",
)


def _convert(
    value: Any, unit: str | None, table: dict[str, float], default_unit: str, *, allow_zero: bool = False
) -> float | None:
    """Convert a metadata value to µm or s; None when missing, unparsable, in an unknown unit or not > 0."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    factor = table.get((unit or default_unit).strip(), table.get((unit or default_unit).strip().lower()))
    if factor is None or not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        return None
    return v * factor


def _natural_key(path: Path) -> list:
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", path.name)]


@contextmanager
def _capture_tifffile_log() -> Iterator[list[str]]:
    """Collect tifffile's warnings (it logs, rather than raises, when a file ends early)."""
    messages: list[str] = []

    class _Collect(logging.Handler):
        def emit(self, record):  # noqa: D102
            messages.append(record.getMessage())

    logger = logging.getLogger("tifffile")
    handler = _Collect(level=logging.WARNING)
    old_propagate = logger.propagate
    logger.addHandler(handler)
    logger.propagate = False
    try:
        yield messages
    finally:
        logger.removeHandler(handler)
        logger.propagate = old_propagate


def _local(tag: str) -> str:
    return tag.rsplit("}", 1)[-1]


def _ome_metadata(xml: str, channel: int) -> dict[str, Any]:
    """Pixel size, frame interval and exposure from the first Image of an OME-XML document."""
    out: dict[str, Any] = {}
    try:
        root = ET.fromstring(xml)
    except ET.ParseError:
        return out
    pixels = next((el for el in root.iter() if _local(el.tag) == "Pixels"), None)
    if pixels is None:
        return out
    a = pixels.attrib
    out["pixel_size_um"] = _convert(a.get("PhysicalSizeX"), a.get("PhysicalSizeXUnit"), _LENGTH_UM, "µm")
    out["pixel_size_y_um"] = _convert(a.get("PhysicalSizeY"), a.get("PhysicalSizeYUnit"), _LENGTH_UM, "µm")
    out["frame_interval_s"] = _convert(a.get("TimeIncrement"), a.get("TimeIncrementUnit"), _TIME_S, "s")
    for key in ("SizeT", "SizeC", "SizeZ"):
        if a.get(key, "").isdigit():
            out[key] = int(a[key])
    planes = [el.attrib for el in pixels if _local(el.tag) == "Plane"]
    mine = [p for p in planes if int(p.get("TheC", 0)) == channel and int(p.get("TheZ", 0)) == 0] or planes
    times = sorted(
        (int(p.get("TheT", 0)), _convert(p.get("DeltaT"), p.get("DeltaTUnit"), _TIME_S, "s", allow_zero=True))
        for p in mine
        if p.get("DeltaT") is not None
    )
    if out["frame_interval_s"] is None and len(times) >= 2:
        t = np.array([v if v is not None else np.nan for _, v in times])
        idx = np.array([k for k, _ in times], dtype=float)
        if np.all(np.isfinite(t)):
            steps = np.diff(t) / np.maximum(np.diff(idx), 1)
            steps = steps[steps > 0]
            out["frame_interval_s"] = float(np.median(steps)) if steps.size else None
    exposures = [
        _convert(p.get("ExposureTime"), p.get("ExposureTimeUnit"), _TIME_S, "s")
        for p in mine
        if p.get("ExposureTime") is not None
    ]
    exposures = [e for e in exposures if e is not None]
    out["exposure_s"] = float(np.median(exposures)) if exposures else None
    return out


def _imagej_metadata(tif) -> dict[str, Any]:
    ij = tif.imagej_metadata or {}
    out: dict[str, Any] = {"pixel_size_um": None, "frame_interval_s": None, "exposure_s": None}
    unit = ij.get("unit")
    tag = tif.pages[0].tags.get("XResolution")
    if unit and tag is not None and unit.lower() not in ("pixel", "pixels", ""):
        num, den = tag.value
        if num > 0 and den > 0 and not (num == den == 1):
            out["pixel_size_um"] = _convert(den / num, unit, _LENGTH_UM, "µm")
    if ij.get("finterval"):
        out["frame_interval_s"] = _convert(ij["finterval"], ij.get("tunit"), _TIME_S, "s")
    return out


class _TiffSource:
    """Frames of one TIFF file: page indices of the chosen channel along the time axis."""

    def __init__(self, path: Path, channel: int | None):
        import tifffile

        self.path = path
        name = path.name
        size = path.stat().st_size
        if size == 0:
            raise InputError(
                expected_got(
                    f"{name}",
                    "a TIFF or OME-TIFF movie",
                    "an empty file (0 bytes)",
                    "Copy or export the movie again.",
                )
            )
        with _capture_tifffile_log() as log:
            try:
                self.tif = tifffile.TiffFile(path)
            except tifffile.TiffFileError as exc:
                with open(path, "rb") as fh:
                    head = fh.read(4)
                if head[:2] in (b"II", b"MM"):
                    raise InputError(
                        expected_got(
                            f"{name}",
                            "a complete TIFF file",
                            f"a damaged or truncated TIFF ({exc})",
                            "Copy the file again from its source; a transfer may have been cut short.",
                        )
                    ) from None
                raise InputError(
                    expected_got(
                        f"{name}",
                        "a TIFF or OME-TIFF movie",
                        f"a file that does not start with a TIFF header (first bytes {head!r})",
                        "Convert the movie to a multi-page TIFF or OME-TIFF.",
                    )
                ) from None
            try:
                self._setup(size, channel, log)
            except InputError:
                self.tif.close()
                raise
            except Exception as exc:  # tifffile raises many kinds on a damaged file
                self.tif.close()
                raise InputError(
                    expected_got(
                        f"{name}",
                        "a complete TIFF file",
                        f"a damaged or truncated TIFF ({type(exc).__name__}: {exc})",
                        "Copy the file again from its source; a transfer may have been cut short.",
                    )
                ) from None

    def _setup(self, size: int, channel: int | None, log: list[str]) -> None:
        name = self.path.name
        tif = self.tif
        if len(tif.pages) == 0 or not tif.series:
            raise InputError(
                expected_got(
                    f"{name}",
                    "a movie with at least 2 frames",
                    "a TIFF that holds no images (0 frames)",
                    "Export the movie again; the file has a header but no frames.",
                )
            )
        series = tif.series[0]
        if len(series.shape) < 2 or min(series.shape) < 1 or not series.axes.replace("S", "").endswith("YX"):
            raise InputError(
                expected_got(
                    f"{name}",
                    "a movie of 2D frames",
                    f"a TIFF without image data (axes '{series.axes}', shape {tuple(series.shape)})",
                    "Export the movie again as a multi-page TIFF or OME-TIFF.",
                )
            )
        damage = [m for m in log if any(sign in m for sign in _DAMAGE_SIGNS)]
        axes, shape = series.axes, tuple(series.shape)
        samples = axes.endswith("S")
        n_samples = shape[-1] if samples else 1
        lead_axes, lead_shape = axes[: -3 if samples else -2], shape[: -3 if samples else -2]
        declared = self._declared_planes()
        found = int(np.prod(lead_shape)) if lead_shape else 1
        if damage or (declared is not None and declared > found * n_samples):
            detail = "; ".join(dict.fromkeys(re.sub(r"<[^>]*>\s*", "", m) for m in damage))
            detail = detail or f"its metadata declares {declared} image planes, {found} were found"
            raise InputError(
                expected_got(
                    f"{name}",
                    "a complete TIFF file",
                    f"a truncated or damaged file ({detail})",
                    "Copy the file again from its source; a transfer or recording may have been cut short.",
                )
            )
        # channels: a C axis, or samples per pixel (RGB)
        n_channels = n_samples
        c_pos = lead_axes.find("C")
        if c_pos >= 0:
            n_channels = lead_shape[c_pos] * (n_samples if samples else 1)
        if n_channels > 1:
            if channel is None:
                raise InputError(
                    expected_got(
                        f"{name}",
                        "a single-channel movie",
                        f"{n_channels} channels (axes '{axes}', shape {shape})",
                        f"Choose one with open_stack(path, channel=k), k = 0..{n_channels - 1}, or save the "
                        "channel to "
                        "analyse as its own stack.",
                    )
                )
            if not 0 <= channel < n_channels:
                raise InputError(
                    expected_got(
                        f"{name}: channel",
                        f"between 0 and {n_channels - 1}",
                        channel,
                        "Choose an existing channel.",
                    )
                )
        elif channel not in (None, 0):
            raise InputError(
                expected_got(
                    f"{name}: channel",
                    "0 or None (the movie has one channel)",
                    channel,
                    "Leave channel unset.",
                )
            )
        # the time axis: the one leading axis (other than C) longer than 1
        long_axes = [
            i for i, (ax, n) in enumerate(zip(lead_axes, lead_shape, strict=True)) if ax != "C" and n > 1
        ]
        if len(long_axes) > 1:
            raise InputError(
                expected_got(
                    f"{name}",
                    "a time series of 2D frames (one axis besides the channel, Y and X)",
                    f"axes '{axes}' with shape {shape}",
                    "Save one focal plane (or a projection) per movie before analysis.",
                )
            )
        n_frames = lead_shape[long_axes[0]] if long_axes else 1
        index = [0] * len(lead_shape)
        pages = []
        c = channel or 0
        for t in range(n_frames):
            if long_axes:
                index[long_axes[0]] = t
            if c_pos >= 0:
                index[c_pos] = c // n_samples if samples else c
            pages.append(int(np.ravel_multi_index(index, lead_shape)) if lead_shape else 0)
        self.page_index = np.asarray(pages, dtype=np.int64)
        self.sample = (c % n_samples) if samples else None
        self.n_frames = n_frames
        self.frame_shape = tuple(int(v) for v in (shape[-3:-1] if samples else shape[-2:]))
        self.dtype = np.dtype(series.dtype)
        self.series = series
        # the last frame's data must lie inside the file
        last = series.pages[int(self.page_index.max())] if len(series.pages) else None
        if last is None:
            raise InputError(
                expected_got(
                    f"{name}",
                    "a complete TIFF file",
                    "a file with missing image planes",
                    "Copy the file again from its source.",
                )
            )
        offsets, counts = last.dataoffsets, last.databytecounts
        ifd_end = self._ifd_end(last)
        if ifd_end is not None and ifd_end > size:
            raise InputError(
                expected_got(
                    f"{name}",
                    "a complete TIFF file",
                    f"a truncated file ({size} bytes; its last frame directory ends at byte {ifd_end})",
                    "Copy the file again from its source; a transfer or recording may have been cut short.",
                )
            )
        if offsets and counts and offsets[-1] + counts[-1] > size:
            raise InputError(
                expected_got(
                    f"{name}",
                    "a complete TIFF file",
                    f"a truncated file ({size} bytes; its last frame needs {offsets[-1] + counts[-1]})",
                    "Copy the file again from its source; a transfer or recording may have been cut short.",
                )
            )
        self.kind, self.metadata = self._metadata(c)

    def _ifd_end(self, page) -> int | None:
        """Byte just past the image file directory of a page (None for pages computed from metadata)."""
        tif = self.tif
        offset = getattr(page, "offset", None)
        if not offset:
            return None
        fmt = tif.tiff
        fh = tif.filehandle
        fh.seek(offset)
        raw = fh.read(fmt.tagnosize)
        if len(raw) < fmt.tagnosize:
            return offset + fmt.tagnosize
        (n_tags,) = struct.unpack(fmt.tagnoformat, raw)
        return offset + fmt.tagnosize + n_tags * fmt.tagsize + fmt.offsetsize

    def _declared_planes(self) -> int | None:
        tif = self.tif
        if tif.is_ome:
            meta = _ome_metadata(tif.ome_metadata or "", 0)
            if all(k in meta for k in ("SizeT", "SizeC", "SizeZ")):
                return meta["SizeT"] * meta["SizeC"] * meta["SizeZ"]
        if tif.is_imagej and (tif.imagej_metadata or {}).get("images"):
            return int(tif.imagej_metadata["images"])
        return None

    def _metadata(self, channel: int) -> tuple[str, dict[str, Any]]:
        tif = self.tif
        if tif.is_ome:
            return "ome-tiff", _ome_metadata(tif.ome_metadata or "", channel)
        if tif.is_imagej:
            return "imagej-tiff", _imagej_metadata(tif)
        return "tiff", {}

    def read(self, start: int, stop: int) -> np.ndarray:
        key = self.page_index[start:stop].tolist()
        try:
            data = self.tif.asarray(key=key, series=0, maxworkers=1)
        except Exception as exc:  # tifffile raises many kinds on damaged data
            raise InputError(
                expected_got(
                    f"{self.path.name}: frames {start}..{stop - 1}",
                    "readable image data",
                    f"a read error ({type(exc).__name__}: {exc})",
                    "The file is damaged or truncated; copy it again from its source.",
                )
            ) from None
        data = data.reshape((stop - start, *data.shape[-(3 if self.sample is not None else 2) :]))
        if self.sample is not None:
            data = data[..., self.sample]
        return data

    def close(self) -> None:
        self.tif.close()


class _FolderSource:
    """Frames stored one per TIFF file in a folder, in natural name order (frame_2 before frame_10)."""

    def __init__(self, path: Path, channel: int | None):
        import tifffile

        self.path = path
        files = sorted(
            (
                p
                for p in path.iterdir()
                if p.is_file() and not p.name.startswith(".") and p.name.lower().endswith(_TIFF_SUFFIXES)
            ),
            key=_natural_key,
        )
        if not files:
            raise InputError(
                expected_got(
                    f"folder {path.name}",
                    "a folder of TIFF images (.tif/.tiff), one frame per file",
                    "no TIFF files",
                    "Point the input at the folder that holds the frames, or at a movie file.",
                )
            )
        self.files = files
        first = _TiffSource(files[0], channel)
        try:
            if first.n_frames != 1:
                raise InputError(
                    expected_got(
                        f"{files[0].name} in folder {path.name}",
                        "a single 2D frame (one file per frame)",
                        f"{first.n_frames} frames",
                        "Give the multi-frame file itself as the input, not its folder.",
                    )
                )
            self.frame_shape, self.dtype = first.frame_shape, first.dtype
            meta = dict(first.metadata)
            meta["frame_interval_s"] = None  # one image per file carries no time step
            self.metadata, self.kind = meta, "folder"
        finally:
            first.close()
        self.n_frames = len(files)
        self.channel = channel
        self._tifffile = tifffile

    def read(self, start: int, stop: int) -> np.ndarray:
        out = np.empty((stop - start, *self.frame_shape), dtype=self.dtype)
        for k in range(start, stop):
            f = self.files[k]
            try:
                src = _TiffSource(f, self.channel)
            except InputError as exc:
                raise InputError(f"folder {self.path.name}, frame {k}: {exc}") from None
            try:
                if src.n_frames != 1 or src.frame_shape != self.frame_shape:
                    raise InputError(
                        expected_got(
                            f"{f.name} (frame {k} of folder {self.path.name})",
                            f"one frame of shape {self.frame_shape} like the first file",
                            f"{src.n_frames} frame(s) of shape {src.frame_shape}",
                            "Keep only the frames of one movie in the folder.",
                        )
                    )
                out[k - start] = src.read(0, 1)[0]
            finally:
                src.close()
        return out

    def close(self) -> None:
        pass


class StackReader:
    """An open movie: frames are read on demand as float32 arrays.

    Use :func:`open_stack` to create one, preferably as a context manager.

    Attributes
    ----------
    path : Path
    kind : str
        ``"ome-tiff"``, ``"imagej-tiff"``, ``"tiff"`` or ``"folder"``.
    n_frames : int
        At least 2 (a single image cannot show motion).
    frame_shape : (ny, nx)
    dtype : numpy dtype
        Data type stored in the file (frames are returned as float32).
    metadata : dict
        ``pixel_size_um`` (µm), ``frame_interval_s`` (s), ``exposure_s`` (s); None when the file does not say.
    """

    def __init__(self, path: str | Path, *, channel: int | None = None):
        p = Path(path)
        if not p.exists():
            raise InputError(
                expected_got(
                    f"input '{p}'",
                    "an existing TIFF/OME-TIFF file or a folder of TIFF images",
                    "nothing at that path",
                    "Check the path (and the inputs glob in the config).",
                )
            )
        self.path = p
        self._source = _FolderSource(p, channel) if p.is_dir() else _TiffSource(p, channel)
        src = self._source
        self.kind: str = src.kind
        self.n_frames: int = int(src.n_frames)
        self.frame_shape: tuple[int, int] = tuple(src.frame_shape)  # type: ignore[assignment]
        self.dtype = np.dtype(src.dtype)
        md = src.metadata
        self.metadata: dict[str, Any] = {
            "pixel_size_um": md.get("pixel_size_um"),
            "frame_interval_s": md.get("frame_interval_s"),
            "exposure_s": md.get("exposure_s"),
        }
        if self.n_frames < 2:
            self.close()
            raise InputError(
                expected_got(
                    f"{p.name}",
                    "a movie with at least 2 frames (motion needs two time points)",
                    f"{self.n_frames} frame of shape {self.frame_shape}",
                    "Give a time-lapse movie, not a single image.",
                )
            )

    # -- reading ----------------------------------------------------------------------------------
    def read_frames(self, start: int, stop: int) -> np.ndarray:
        """Frames ``start`` (inclusive) to ``stop`` (exclusive) as float32, shape (stop - start, ny, nx).

        Raises
        ------
        InputError
            When a frame holds NaN or infinite values (the message names the frame) or cannot be read.
        """
        start, stop = int(start), int(stop)
        if not 0 <= start < stop <= self.n_frames:
            raise ValueError(
                expected_got(
                    "frame range [start, stop)",
                    f"within [0, {self.n_frames}) with start < stop",
                    (start, stop),
                    "Ask for existing frames.",
                )
            )
        data = self._source.read(start, stop)
        frames = np.asarray(data, dtype=np.float32)
        if data.dtype.kind in "fc":
            finite = np.isfinite(frames).reshape(len(frames), -1)
            if not finite.all():
                bad = int(np.flatnonzero(~finite.all(axis=1))[0])
                n_bad = int((~finite[bad]).sum())
                raise InputError(
                    expected_got(
                        f"{self.path.name}: frame {start + bad}",
                        "finite numbers in every pixel",
                        f"{n_bad} NaN or infinite pixel(s)",
                        "Replace them (for example with the frame's median) or cut the frame out before "
                        "analysis.",
                    )
                )
        return frames

    def iter_chunks(self, n_frames_per_chunk: int) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(first_frame, frames)`` over the whole movie, ``n_frames_per_chunk`` frames at a time.

        Only one chunk is held in memory at a time (frames are read from disk when the chunk is reached).
        """
        n = int(n_frames_per_chunk)
        if n < 1:
            raise ValueError(
                expected_got("n_frames_per_chunk", ">= 1", n_frames_per_chunk, "Give a frame count.")
            )
        for first in range(0, self.n_frames, n):
            yield first, self.read_frames(first, min(first + n, self.n_frames))

    # -- lifetime ---------------------------------------------------------------------------------
    def close(self) -> None:
        """Release the file handle."""
        self._source.close()

    def __enter__(self) -> StackReader:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __len__(self) -> int:
        return self.n_frames

    def __repr__(self) -> str:
        return (
            f"StackReader('{self.path}', kind={self.kind}, n_frames={self.n_frames}, "
            f"frame_shape={self.frame_shape}, dtype={self.dtype})"
        )


def open_stack(path: str | Path, *, channel: int | None = None) -> StackReader:
    """Open a movie for reading frame by frame.

    Parameters
    ----------
    path : str or Path
        A multi-page TIFF, an OME-TIFF, an ImageJ hyperstack, or a folder of single-frame TIFF files (read in
        natural name order).
    channel : int, optional
        Channel to read from a multichannel (or RGB) movie; required when there is more than one.

    Returns
    -------
    StackReader
        Use as a context manager: ``with open_stack(p) as stack: ...``.

    Raises
    ------
    InputError
        Missing path, not a TIFF, empty or truncated file, a single frame, several channels without
        ``channel``, or several stacked axes besides time.

    Examples
    --------
    >>> import tempfile, tifffile, numpy as np, os
    >>> p = os.path.join(tempfile.mkdtemp(), "m.tif")
    >>> tifffile.imwrite(p, np.zeros((3, 8, 8), np.uint16))
    >>> with open_stack(p) as s:
    ...     s.n_frames, s.frame_shape
    (3, (8, 8))
    """
    return StackReader(path, channel=channel)
