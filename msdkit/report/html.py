"""A self-contained HTML report (figures embedded as base64 PNG), readable from disk in any browser."""

from __future__ import annotations

import base64
import html
import json
import math
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd

from .._version import __version__

_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,sans-serif;margin:2em auto;max-width:1200px;color:#222;padding:0 1em}
h1{font-size:1.5em;margin-bottom:.2em} h2{font-size:1.2em;margin-top:2em;border-bottom:1px solid #ccc}
table{border-collapse:collapse;font-size:.9em} td,th{padding:.25em .6em;border-bottom:1px solid #e4e4e4;text-align:right}
th{background:#f3f3f3} td.l,th.l{text-align:left} tr.failed td{background:#fde8e8}
.note{color:#555;font-size:.85em} img{max-width:100%} .caution{background:#fff8e1;padding:.6em 1em;border-left:4px solid #e0a800}
code{background:#f4f4f4;padding:0 .2em}
"""

_CAUTION = (
    "These are research measurements. Validate the whole chain against reference particles of certified size "
    "measured under the same conditions, keep the temperature controlled and recorded (1 K changes the size by "
    "about 2.6 % in water near 25 °C), and follow your laboratory's own practice before relying on a number."
)


def _fmt(v, spec=".4g"):
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "–"
    try:
        return format(float(v), spec)
    except (TypeError, ValueError):
        return html.escape(str(v))


def _img(data: bytes, alt: str) -> str:
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{base64.b64encode(data).decode()}">'


def _stack_section(stack_dir: Path) -> str:
    summary_path = stack_dir / "summary.json"
    if not summary_path.is_file():
        return ""
    s = json.loads(summary_path.read_text())
    name = html.escape(stack_dir.name)
    ci = s.get("D_ci95_um2_s") or [None, None]
    aci = s.get("alpha_ci95") or [None, None]
    rci = s.get("radius_ci95_nm") or [None, None]
    rows = [
        ("D (µm²/s)", f"{_fmt(s.get('D_um2_s'))} [{_fmt(ci[0])}, {_fmt(ci[1])}]"),
        ("anomalous exponent α", f"{_fmt(s.get('alpha'), '.3f')} [{_fmt(aci[0], '.3f')}, {_fmt(aci[1], '.3f')}]"),
        ("hydrodynamic radius (nm)", f"{_fmt(s.get('radius_nm'), '.1f')} [{_fmt(rci[0], '.1f')}, {_fmt(rci[1], '.1f')}]"),
        ("tracks", _fmt(s.get("n_tracks"), "d")
         + (f" (sample D from {_fmt(s.get('n_tracks_D'), 'd')} tracks of 3 or more points)"
            if s.get("n_tracks_D") not in (None, s.get("n_tracks")) else "")),
        ("localisation SD (nm)", _fmt((s.get("localization_sd_um") or math.nan) * 1000, ".1f")),
        ("viscosity (mPa·s) at °C", f"{_fmt(s.get('viscosity_mpa_s'))} at {_fmt(s.get('temperature_c'))}"),
        ("drift (µm/s)", ", ".join(_fmt(v) for v in (s.get("drift_um_s") or []))),
        ("flags", html.escape("; ".join(s.get("flags") or []) or "none")),
        ("estimator", html.escape(str(s.get("estimator")))),
    ]
    for caution in s.get("cautions") or []:
        rows.append(("caution", html.escape(str(caution))))
    dist = s.get("size_distribution") or {}
    if dist:
        rows.append(("number-weighted D10 / D50 / D90 (nm)",
                     " / ".join(_fmt(dist.get(k), ".1f") for k in ("d10_nm", "d50_nm", "d90_nm"))))
    table = "".join(f"<tr><th class=l>{k}</th><td class=l>{v}</td></tr>" for k, v in rows)
    fig = stack_dir / "overview.png"
    img = _img(fig.read_bytes(), f"overview of {name}") if fig.is_file() else ""
    return f'<h2 id="{name}">{name}</h2><table>{table}</table>{img}'


def write_report(output_dir: Path | str, rows=None) -> Path:
    """Write ``report.html`` into an output folder from its batch_summary.csv and per-input folders.

    Parameters
    ----------
    output_dir : path
        A folder written by ``msdkit run``.
    rows : ignored, optional
        Accepted for callers that hold the batch rows; the report always reads the files.
    """
    from ..io.atomic import write_text_atomic
    from .figures import batch_png

    out = Path(output_dir)
    summary_csv = out / "batch_summary.csv"
    if not summary_csv.is_file():
        raise FileNotFoundError(f"{summary_csv} not found: run 'msdkit run CONFIG' first.")
    summary = pd.read_csv(summary_csv, keep_default_na=False, na_values=[""])
    head = ["stack", "status", "n_tracks", "D_um2_s", "alpha", "radius_nm", "flags", "error"]
    body = []
    for _, r in summary.iterrows():
        cls = "failed" if r["status"] != "ok" else ""
        link = f'<a href="#{html.escape(str(r["stack"]))}">{html.escape(str(r["stack"]))}</a>'
        body.append(
            f'<tr class="{cls}"><td class=l>{link}</td><td class=l>{html.escape(str(r["status"]))}</td>'
            f'<td>{_fmt(r["n_tracks"], ".0f")}</td><td>{_fmt(r["D_um2_s"])}</td><td>{_fmt(r["alpha"], ".3f")}</td>'
            f'<td>{_fmt(r["radius_nm"], ".1f")}</td><td class=l>{html.escape(str(r["flags"] or ""))}</td>'
            f'<td class=l>{html.escape(str(r["error"] or ""))}</td></tr>'
        )
    thead = "".join(f"<th class=l>{h}</th>" for h in head)
    sections = "".join(_stack_section(out / str(s)) for s in summary.loc[summary["status"] == "ok", "stack"])
    overview = _img(batch_png(summary), "batch overview") if (summary["status"] == "ok").any() else ""
    when = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>msdkit report: {html.escape(out.name)}</title>
<style>{_CSS}</style></head><body>
<h1>Diffusion and size report</h1>
<p class=note>{len(summary)} input(s), {int((summary['status'] == 'ok').sum())} analysed, written {when} by msdkit
{__version__}. Folder: <code>{html.escape(str(out.resolve()))}</code></p>
<p class=caution>{_CAUTION}</p>
<h2>All inputs</h2><table><tr>{thead}</tr>{''.join(body)}</table>
{overview}
{sections}
<p class=note>D: pooled over all tracks with localisation-error and motion-blur correction; interval: 95 %,
bootstrap over tracks. Radius: Stokes–Einstein with the medium viscosity at the stated temperature.</p>
</body></html>"""
    path = out / "report.html"
    write_text_atomic(page, path)
    return path
