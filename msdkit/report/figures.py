"""Figures (matplotlib, Agg backend, imported only when drawing)."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pandas as pd


def _figure(**kw):
    """Return a figure on its own Agg canvas.

    Not through pyplot: no global figure manager (figures can be drawn on any thread, and nothing has to be
    closed) and no pyplot import (a fresh process saves its backend machinery).
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(**kw)
    FigureCanvasAgg(fig)
    return fig


def _save(fig, path: Path | None, *, tight: bool = True) -> bytes:
    """PNG bytes of the figure (written atomically to ``path`` when given).

    ``tight`` crops to the drawn content, which draws the figure twice; figures laid out with fixed margins
    pass False and are drawn once.
    """
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, **({"bbox_inches": "tight"} if tight else {}))
    data = buf.getvalue()
    if path is not None:
        from ..io.atomic import write_bytes_atomic

        write_bytes_atomic(data, path)
    return data


def _first_tracks(tracks: pd.DataFrame, n: int) -> pd.DataFrame:
    """Rows of the first ``n`` tracks in order of first appearance (``tracks[tracks.track.isin(first n)]``).

    When the table is sorted by track (as the pipeline leaves it) those rows are its first rows: only that
    prefix is read, not the whole (possibly 10-million-row) table.
    """
    t = tracks["track"].to_numpy()
    if t.size and t.dtype.kind in "iu" and bool(np.all(t[1:] >= t[:-1])):
        starts = np.flatnonzero(np.r_[True, t[1:] != t[:-1]])
        stop = int(starts[n]) if starts.size > n else t.size
        return tracks.iloc[:stop]
    return tracks[tracks["track"].isin(tracks["track"].unique()[:n])]


def stack_overview_png(
    tracks: pd.DataFrame,
    track_fits: pd.DataFrame,
    ensemble: pd.DataFrame,
    summary: dict,
    size_table: pd.DataFrame | None = None,
    path: Path | None = None,
) -> bytes:
    """Four panels for one sample: tracks, ensemble MSD with the fitted line, per-track D, sizes."""
    fig = _figure(figsize=(17, 3.9))
    axes = fig.subplots(1, 4)
    ax = axes[0]
    has_classes = "motion_class" in track_fits
    palette = {"normal": "#4c72b0", "subdiffusive": "#c44e52", "superdiffusive": "#dd8452",
               "confined": "#8172b3", "directed": "#55a868", "immobile": "#7f7f7f", "undetermined": "#bbbbbb"}
    from matplotlib.collections import LineCollection

    shown = _first_tracks(tracks, 400)
    t = shown["track"].to_numpy()
    if t.size and t.dtype.kind in "iu" and bool(np.all(t[1:] >= t[:-1])):  # sorted: each track is one run
        starts = np.flatnonzero(np.r_[True, t[1:] != t[:-1]])
        xy = np.column_stack([shown["x_um"].to_numpy(float), shown["y_um"].to_numpy(float)])
        ids, segments = t[starts].tolist(), np.split(xy, starts[1:])
    else:
        ids, segments = [], []
        for tid, g in shown.groupby("track", sort=False):
            ids.append(tid)
            segments.append(np.column_stack([g["x_um"].to_numpy(float), g["y_um"].to_numpy(float)]))
    cls_of = {}
    if has_classes:  # the shown tracks' classes only (a dict of all 20,000 costs more than the lookups)
        rows = track_fits["track"].isin(ids).to_numpy()
        cls_of = dict(zip(track_fits["track"][rows].tolist(), track_fits["motion_class"][rows].tolist(),
                          strict=True))
    colours = [palette.get(cls_of.get(tid, "undetermined") if has_classes else "normal", "#4c72b0")
               for tid in ids]
    if segments:  # one collection for all shown tracks draws much faster than one line each
        ax.add_collection(LineCollection(segments, colors=colours, linewidths=0.6))
        ax.autoscale_view()
    ax.set_aspect("equal", adjustable="datalim")
    ax.invert_yaxis()
    ax.set(xlabel="x (µm)", ylabel="y (µm)",
           title=f"{summary.get('n_tracks', '?')} tracks (colour = motion class)")

    ax = axes[1]
    e = ensemble[ensemble["msd_um2"] > 0]
    ax.errorbar(e["lag_s"], e["msd_um2"], yerr=e["sem_um2"], fmt="o", ms=3, lw=0.8, label="ensemble MSD")
    D = summary.get("D_um2_s")
    if D and np.isfinite(D) and D > 0 and len(e):
        te = summary.get("exposure_s") or 0.0
        sig = summary.get("localization_sd_um") or 0.0
        t = np.linspace(e["lag_s"].min(), e["lag_s"].max(), 100)
        model = 4 * D * (t - te / 3.0) + 4 * sig**2
        ax.plot(t[model > 0], model[model > 0], "k-", lw=1, label=f"4D(t − t_E/3) + 4σ², D = {D:.3g} µm²/s")
    ax.set(xscale="log", yscale="log", xlabel="lag (s)", ylabel="MSD (µm²)",
           title="mean squared displacement")
    ax.legend(fontsize=7)

    ax = axes[2]
    d = track_fits["D_um2_s"].to_numpy(float)
    d = d[np.isfinite(d)]
    if d.size:
        lo, hi = np.percentile(d, [1, 99])
        ax.hist(d, bins=40, range=(min(lo, 0), hi if hi > lo else lo + 1), color="#8fb3d9")
        if D and np.isfinite(D):
            ax.axvline(D, color="k", lw=1, label="sample D (pooled)")
            ax.legend(fontsize=7)
    ax.set(xlabel="per-track D (µm²/s)", ylabel="tracks", title="per-track diffusion coefficients")

    ax = axes[3]
    if size_table is not None and len(size_table) and "diameter_nm" in size_table:
        x = size_table["diameter_nm"].to_numpy(float)
        for col, lab, style in (("raw_number_fraction", "per-track (raw)", "--"),
                                ("number_fraction", "deconvolved, number", "-"),
                                ("volume_fraction", "deconvolved, volume", ":")):
            if col in size_table:
                ax.plot(x, size_table[col], style, label=lab)
        ax.set_xscale("log")
        ax.legend(fontsize=7)
    ax.set(xlabel="hydrodynamic diameter (nm)", ylabel="fraction per bin", title="size distribution")
    fig.suptitle(str(summary.get("stack", "")), fontsize=10)
    # fixed margins (room for the tick labels, axis labels and titles) so that the figure is drawn once
    fig.subplots_adjust(left=0.045, right=0.99, bottom=0.15, top=0.86, wspace=0.3)
    return _save(fig, path, tight=False)


def write_stack_figures(stack_dir: Path, result) -> None:
    """Write ``overview.png`` for one analysed input."""
    summary = {**result.summary, "stack": Path(stack_dir).name}
    stack_overview_png(result.tracks, result.track_fits, result.ensemble_msd, summary, result.size_table,
                       Path(stack_dir) / "overview.png")


def batch_png(summary: pd.DataFrame, path: Path | None = None) -> bytes:
    """D with its 95 % interval and hydrodynamic diameter for every input of a batch."""
    ok = summary[summary["status"] == "ok"].reset_index(drop=True)
    fig = _figure(figsize=(12, max(2.5, 0.28 * len(ok) + 1.2)))
    axes = fig.subplots(1, 2)
    y = np.arange(len(ok))
    if len(ok):
        D = ok["D_um2_s"].to_numpy(float)
        lo = ok.get("D_ci95_lo_um2_s", pd.Series(D)).to_numpy(float)
        hi = ok.get("D_ci95_hi_um2_s", pd.Series(D)).to_numpy(float)
        axes[0].errorbar(D, y, xerr=[np.clip(D - lo, 0, None), np.clip(hi - D, 0, None)], fmt="o", ms=4)
        axes[1].plot(2 * ok["radius_nm"].to_numpy(float), y, "s", ms=4)
        for ax in axes:
            ax.set_yticks(y)
            ax.set_yticklabels(ok["stack"], fontsize=7)
            ax.invert_yaxis()
    axes[0].set(xlabel="D (µm²/s), 95 % interval", title="diffusion coefficient")
    axes[1].set(xlabel="hydrodynamic diameter (nm)", title="size (Stokes–Einstein)")
    return _save(fig, path)
