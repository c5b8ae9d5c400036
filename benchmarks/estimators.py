"""Precision, bias and interval coverage of the estimators of D against the Cramér-Rao bound.

Monte Carlo over N in {20, 50, 100, 500} positions, x = sigma^2/(D dt) in {0.1, 1, 10} and blur R in {0, 1/6}:
every cell simulates M independent 2D Brownian tracks with exact motion blur and localisation noise
(msdkit.simulate.brownian_positions) and fits them with each estimator and with ``auto`` (which picks its
estimator from the pooled x of the M tracks, as it would for a sample).

Printed per cell and estimator: bias (mean D_hat / D - 1, with its Monte Carlo SE), relative SD, ratio of the
SD to the exact Cramér-Rao bound (msdkit.fit.cramer_rao_relative_sd) and the coverage of the 95 % intervals.
Targets: |bias| <= 1 %, auto within 1.1 x the bound, coverage 93-97 %.

Usage: python benchmarks/estimators.py [--scale 1.0] [--seed 1] [--markdown out.md]
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np

from msdkit.fit import cramer_rao_relative_sd, fit_tracks
from msdkit.simulate import brownian_positions, positions_to_tracks

METHODS = ("covariance", "likelihood", "one_step_likelihood", "msd_fit", "auto")


def n_tracks_for(N: int, scale: float) -> int:
    return int(scale * min(40000, max(4000, 2_000_000 // N)))


def run(scale: float, seed: int, sizes=(20, 50, 100, 500)):
    dt, D = 0.01, 1.0
    rows = []
    g = np.random.default_rng(seed)
    for N in sizes:
        M = n_tracks_for(N, scale)
        for x in (0.1, 1.0, 10.0):
            for R in (0.0, 1.0 / 6.0):
                sigma = np.sqrt(x * D * dt)
                pos = brownian_positions(M, N, D_um2_s=D, frame_interval_s=dt, exposure_s=6 * R * dt,
                                         localization_sd_um=sigma, rng=g)
                tracks = positions_to_tracks(pos, frame_interval_s=dt)
                crb = cramer_rao_relative_sd(N, x, blur_R=R)
                for m in METHODS:
                    t0 = time.perf_counter()
                    f = fit_tracks(tracks, frame_interval_s=dt, exposure_s=6 * R * dt, method=m,
                                   fit_alpha=False)
                    el = time.perf_counter() - t0
                    ok = f["fit_status"].to_numpy() == "ok"
                    Dh = f["D_um2_s"].to_numpy()[ok]
                    lo = f["D_ci95_lo_um2_s"].to_numpy()[ok]
                    hi = f["D_ci95_hi_um2_s"].to_numpy()[ok]
                    rel = Dh / D
                    rows.append(dict(
                        N=N, x=x, R=R, method=m, used=str(f["method"].iloc[0]), M=int(ok.sum()),
                        bias=float(rel.mean() - 1), bias_se=float(rel.std(ddof=1) / np.sqrt(rel.size)),
                        rel_sd=float(rel.std(ddof=1)), crb=crb, ratio=float(rel.std(ddof=1) / crb),
                        coverage=float(np.mean((lo <= D) & (hi >= D))),
                        inf_hi=float(np.mean(~np.isfinite(hi))), seconds=el,
                    ))
                    r = rows[-1]
                    print(f"N={N:4d} x={x:5.1f} R={R:.3f} {m:10s}->{r['used']:10s} M={r['M']:6d} "
                          f"bias={100 * r['bias']:+6.2f}±{100 * r['bias_se']:.2f}% "
                          f"sd={100 * r['rel_sd']:6.2f}% "
                          f"crb={100 * crb:6.2f}% ratio={r['ratio']:5.3f} cover={100 * r['coverage']:5.1f}% "
                          f"({el:.1f}s)", flush=True)
    return rows


def markdown(rows) -> str:
    out = ["| N | x | R | tracks | CRB % | " + " | ".join(f"{m} bias % / SD÷CRB / cover %" for m in METHODS)
           + " |", "|---|---|---|---|---|" + "---|" * len(METHODS)]
    keys = sorted({(r["N"], r["x"], r["R"]) for r in rows})
    for k in keys:
        cell = {r["method"]: r for r in rows if (r["N"], r["x"], r["R"]) == k}
        crb = next(iter(cell.values()))["crb"]
        parts = []
        for m in METHODS:
            r = cell[m]
            tag = f" ({r['used'][:3]})" if m == "auto" else ""
            se = f"±{100 * r['bias_se']:.2f}" if m == "auto" else ""
            parts.append(f"{100 * r['bias']:+.2f}{se} / {r['ratio']:.3f} / {100 * r['coverage']:.1f}{tag}")
        M = next(iter(cell.values()))["M"]
        out.append(f"| {k[0]} | {k[1]:g} | {k[2]:.3g} | {M} | {100 * crb:.1f} | " + " | ".join(parts) + " |")
    auto = [r for r in rows if r["method"] == "auto"]
    out.append("")
    out.append(f"auto: max |bias| {100 * max(abs(r['bias']) for r in auto):.2f} %, max SD/CRB "
               f"{max(r['ratio'] for r in auto):.3f}, coverage {100 * min(r['coverage'] for r in auto):.1f}-"
               f"{100 * max(r['coverage'] for r in auto):.1f} %")
    for m in METHODS[:-1]:
        rs = [r for r in rows if r["method"] == m]
        out.append(f"{m}: max |bias| {100 * max(abs(r['bias']) for r in rs):.2f} %, SD/CRB "
                   f"{min(r['ratio'] for r in rs):.3f}-{max(r['ratio'] for r in rs):.3f}, coverage "
                   f"{100 * min(r['coverage'] for r in rs):.1f}-{100 * max(r['coverage'] for r in rs):.1f} %")
    return "\n".join(out)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scale", type=float, default=1.0, help="multiplies the number of tracks per cell")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--sizes", default="20,50,100,500", help="comma-separated track lengths N")
    ap.add_argument("--markdown", help="also write the table to this file")
    ap.add_argument("--json", help="also write the rows to this file (for merging runs with --merge)")
    ap.add_argument("--merge", nargs="*", default=[], help="rows of earlier --json runs to add")
    args = ap.parse_args()
    rows = []
    for path in args.merge:
        with open(path) as fh:
            rows += json.load(fh)
    sizes = tuple(int(v) for v in args.sizes.split(",") if v)
    new = run(args.scale, args.seed, sizes) if sizes else []
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(new, fh)
    rows += new
    md = markdown(rows)
    print()
    print(md)
    if args.markdown:
        with open(args.markdown, "w") as fh:
            fh.write(md + "\n")


if __name__ == "__main__":
    main()
