"""Benchmark of motion classes, sample flags, drift correction and per-track alpha (prints tables).

Run:  python benchmarks/classify.py [--samples 200] [--tracks-per-class 400] [--seed 1]

Everything is simulated with msdkit.simulate (known truth), one core, fixed seed:

1. Sample flags over ``--samples`` samples per condition; each sample has 30-100 tracks of 50-300 points,
   reduced localisation error x = sigma^2/(D dt) (for FBM sigma^2/(K dt^alpha)) uniform in [0, 3], exposure
   0, 0.5 or 1 frame interval:
   - Brownian: rate of the false `subdiffusive` flag (target <= 5 %) and of every other flag;
   - fractional Brownian motion with alpha uniform in [0.2, 0.7]: `subdiffusive` detection (target >= 95 %);
   - Brownian with a common drift: `superdiffusive` after drift correction (target: as rare as on Brownian),
     and without correction for contrast.
2. Per-track confusion matrix for tracks of 100 and 300 points (target accuracy >= 85 % at 300): classes
   normal (Brownian), subdiffusive (FBM alpha 0.2-0.7), superdiffusive (FBM alpha 1.3-1.8), confined (box
   crossed in 1-10 frames: L^2/(12 D dt) log-uniform in [1, 10]), directed (speed 0.3-1 sqrt(D/dt),
   log-uniform), immobile (noise only, sigma 10-100 nm); x uniform in [0, 3].
3. Per-track alpha mean absolute error on mixed models (Brownian and FBM with alpha uniform in [0.1, 1.9],
   lengths 50-300, x in [0, 3]) against a plain log-log fit of the time-averaged MSD over lags 1-10, computed
   on the same tracks in the same run.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd

from msdkit.classify import classify_tracks, sample_motion
from msdkit.drift import estimate_drift, remove_drift
from msdkit.simulate import (
    brownian_positions,
    confined_positions,
    directed_positions,
    fbm_positions,
    positions_to_tracks,
)

DT = 0.03  # s
EXPOSURES = (0.0, 0.5, 1.0)  # fractions of the frame interval
CLASSES = ("normal", "subdiffusive", "superdiffusive", "confined", "directed", "immobile")


def loglog_alpha(pos: np.ndarray, max_lag: int = 10) -> np.ndarray:
    """Plain log-log slope of the time-averaged MSD over lags 1..max_lag (the usual quick estimate)."""
    T, N, _ = pos.shape
    lags = np.arange(1, min(max_lag, N - 1) + 1)
    msd = np.stack([np.mean(np.sum((pos[:, n:] - pos[:, :-n]) ** 2, axis=2), axis=1) for n in lags], axis=1)
    lx = np.log(lags) - np.log(lags).mean()
    return (np.log(msd) @ lx) / np.sum(lx**2)


# ------------------------------------------------------------------------------------------- sample flags
def simulate_sample(kind: str, rng: np.random.Generator):
    n = int(rng.integers(30, 101))
    e = DT * float(rng.choice(EXPOSURES))
    lengths = rng.integers(50, 301, n)
    x = rng.uniform(0, 3)
    D = float(np.exp(rng.uniform(np.log(0.05), np.log(2.0))))
    truth = {"x": x}
    if kind == "brownian":
        p = brownian_positions(
            n,
            300,
            D_um2_s=D,
            frame_interval_s=DT,
            exposure_s=e,
            localization_sd_um=np.sqrt(x * D * DT),
            rng=rng,
        )
    elif kind == "fbm":
        a = rng.uniform(0.2, 0.7)
        truth["alpha_true"] = a
        p = fbm_positions(
            n,
            300,
            alpha=a,
            K_um2_s_alpha=D,
            frame_interval_s=DT,
            exposure_s=e,
            localization_sd_um=np.sqrt(x * D * DT**a),
            rng=rng,
        )
    elif kind == "drift":
        speed = rng.uniform(0.5, 3.0) * np.sqrt(D / (100 * DT))  # drift over 100 frames: 0.5-3 x diffusion
        ang = rng.uniform(0, 2 * np.pi)
        v = speed * np.array([np.cos(ang), np.sin(ang)])
        truth["speed_um_s"] = speed
        p = brownian_positions(
            n,
            300,
            D_um2_s=D,
            frame_interval_s=DT,
            exposure_s=e,
            localization_sd_um=np.sqrt(x * D * DT),
            drift_um_s=v,
            rng=rng,
        )
    else:
        raise ValueError(kind)
    tracks = positions_to_tracks(
        p, frame_interval_s=DT, lengths=lengths, first_frames=rng.integers(0, 200, n)
    )
    return tracks, e, truth


def run_sample_flags(
    n_samples: int, rng: np.random.Generator, kinds=("brownian", "fbm", "drift")
) -> pd.DataFrame:
    rows = []
    for kind in kinds:
        for _ in range(n_samples):
            tracks, e, truth = simulate_sample(kind, rng)
            drift = estimate_drift(tracks, frame_interval_s=DT)
            corrected = remove_drift(tracks, drift) if drift.safe_to_subtract else tracks
            cls = classify_tracks(corrected, frame_interval_s=DT, exposure_s=e)
            m = sample_motion(
                corrected, cls, None, drift, frame_interval_s=DT, exposure_s=e, n_boot=200, rng=rng
            )
            row = {
                "condition": kind,
                "alpha": m.alpha,
                "alpha_lo": m.alpha_ci95[0],
                "alpha_hi": m.alpha_ci95[1],
                **{f"flag_{f}": True for f in m.flags},
                **truth,
            }
            if kind == "drift":  # the same sample without correction, for contrast
                cls0 = classify_tracks(tracks, frame_interval_s=DT, exposure_s=e)
                m0 = sample_motion(
                    tracks,
                    cls0,
                    None,
                    drift,
                    frame_interval_s=DT,
                    exposure_s=e,
                    drift_corrected=False,
                    n_boot=200,
                    rng=rng,
                )
                row["uncorrected_superdiffusive"] = "superdiffusive" in m0.flags
            rows.append(row)
    df = pd.DataFrame(rows)
    flag_cols = [c for c in df.columns if c.startswith("flag_")]
    df[flag_cols] = df[flag_cols].fillna(False).astype(bool)
    return df


def report_sample_flags(df: pd.DataFrame) -> None:
    flags = sorted(c for c in df.columns if c.startswith("flag_"))
    print("\n## Sample flags (fraction of samples carrying each flag)\n")
    print("| condition | samples | " + " | ".join(f[5:] for f in flags) + " | mean alpha |")
    print("|---|---|" + "---|" * len(flags) + "---|")
    for cond, g in df.groupby("condition", sort=False):
        print(
            f"| {cond} | {len(g)} | "
            + " | ".join(f"{g[f].mean():.3f}" for f in flags)
            + f" | {g['alpha'].mean():.3f} |"
        )
    b = df[df.condition == "brownian"]
    f = df[df.condition == "fbm"]
    d = df[df.condition == "drift"]
    if len(f) == 0 or len(d) == 0:
        return
    print(
        f"\nfalse `subdiffusive` on Brownian: {b['flag_subdiffusive'].mean():.3f} (target <= 0.05; "
        f"x >= 2: {b.loc[b.x >= 2, 'flag_subdiffusive'].mean():.3f})"
    )
    print(
        f"`subdiffusive` detection on FBM alpha 0.2-0.7: {f['flag_subdiffusive'].mean():.3f} "
        "(target >= 0.95; "
        f"alpha >= 0.6: {f.loc[f.alpha_true >= 0.6, 'flag_subdiffusive'].mean():.3f}); estimated alpha "
        f"minus truth: mean {(f.alpha - f.alpha_true).mean():+.3f}, SD {(f.alpha - f.alpha_true).std():.3f}"
    )
    sup = d["flag_superdiffusive"].mean() if "flag_superdiffusive" in d else 0.0
    print(
        f"drifting Brownian: `superdiffusive` after drift correction {sup:.3f}, without correction "
        f"{d['uncorrected_superdiffusive'].mean():.3f}; `drift` flag {d['flag_drift'].mean():.3f}"
    )


# ---------------------------------------------------------------------------------------- per-track classes
def simulate_class(cls: str, n: int, N: int, e: float, rng: np.random.Generator):
    x = rng.uniform(0, 3, n)
    D = np.exp(rng.uniform(np.log(0.05), np.log(5), n))
    alpha = np.ones(n)
    out = np.empty((n, N, 2))
    for i in range(n):
        kw = dict(frame_interval_s=DT, exposure_s=e, rng=rng)
        if cls == "normal":
            p = brownian_positions(1, N, D_um2_s=D[i], localization_sd_um=np.sqrt(x[i] * D[i] * DT), **kw)
        elif cls in ("subdiffusive", "superdiffusive"):
            a = rng.uniform(0.2, 0.7) if cls == "subdiffusive" else rng.uniform(1.3, 1.8)
            alpha[i] = a
            p = fbm_positions(
                1, N, alpha=a, K_um2_s_alpha=D[i], localization_sd_um=np.sqrt(x[i] * D[i] * DT**a), **kw
            )
        elif cls == "confined":
            tau = np.exp(rng.uniform(np.log(1), np.log(10)))
            p = confined_positions(
                1,
                N,
                D_um2_s=D[i],
                box_um=np.sqrt(12 * D[i] * tau * DT),
                localization_sd_um=np.sqrt(x[i] * D[i] * DT),
                **kw,
            )
        elif cls == "directed":
            u = np.exp(rng.uniform(np.log(0.3), np.log(1.0)))
            p = directed_positions(
                1,
                N,
                D_um2_s=D[i],
                speed_um_s=u * np.sqrt(D[i] / DT),
                localization_sd_um=np.sqrt(x[i] * D[i] * DT),
                **kw,
            )
        else:  # immobile
            p = np.exp(rng.uniform(np.log(0.01), np.log(0.1))) * rng.standard_normal((1, N, 2))
        out[i] = p[0]
    return out, alpha


def run_confusion(n_per_class: int, rng: np.random.Generator) -> pd.DataFrame:
    rows = []
    for N in (100, 300):
        for cls in CLASSES:
            for e_frac in EXPOSURES:
                e = e_frac * DT
                pos, _ = simulate_class(cls, max(1, n_per_class // len(EXPOSURES)), N, e, rng)
                out = classify_tracks(
                    positions_to_tracks(pos, frame_interval_s=DT), frame_interval_s=DT, exposure_s=e
                )
                rows.append(pd.DataFrame({"N": N, "true": cls, "pred": out["motion_class"].to_numpy()}))
    return pd.concat(rows, ignore_index=True)


def report_confusion(df: pd.DataFrame) -> None:
    cols = list(CLASSES) + ["undetermined"]
    for N, g in df.groupby("N"):
        acc = float(np.mean(g["true"] == g["pred"]))
        decided = g["pred"] != "undetermined"
        acc_dec = float(np.mean(g.loc[decided, "true"] == g.loc[decided, "pred"]))
        print(f"\n## Per-track confusion, {N} points (rows: truth, columns: class given, fraction of row)\n")
        print("| truth | " + " | ".join(cols) + " |")
        print("|---|" + "---|" * len(cols))
        for t in CLASSES:
            r = g[g["true"] == t]["pred"].value_counts(normalize=True)
            print(f"| {t} | " + " | ".join(f"{r.get(c, 0.0):.2f}" for c in cols) + " |")
        print(
            f"\naccuracy {acc:.3f} over {len(g)} tracks (undetermined counted wrong); "
            f"{acc_dec:.3f} among the {decided.mean():.0%} decided"
            + (" (target >= 0.85)" if N == 300 else "")
        )


# ----------------------------------------------------------------------------------------- per-track alpha
def run_alpha_mae(n_tracks: int, rng: np.random.Generator) -> pd.DataFrame:
    rows = []
    for _ in range(n_tracks // 50):
        N = int(rng.integers(50, 301))
        e = DT * float(rng.choice(EXPOSURES))
        n = 50
        brown = rng.uniform(size=n) < 0.2
        a = np.where(brown, 1.0, rng.uniform(0.1, 1.9, n))
        x = rng.uniform(0, 3, n)
        pos = np.empty((n, N, 2))
        for i in range(n):
            if brown[i]:
                pos[i] = brownian_positions(
                    1,
                    N,
                    D_um2_s=0.5,
                    frame_interval_s=DT,
                    exposure_s=e,
                    localization_sd_um=np.sqrt(x[i] * 0.5 * DT),
                    rng=rng,
                )[0]
            else:
                pos[i] = fbm_positions(
                    1,
                    N,
                    alpha=a[i],
                    K_um2_s_alpha=0.5,
                    frame_interval_s=DT,
                    exposure_s=e,
                    localization_sd_um=np.sqrt(x[i] * 0.5 * DT ** a[i]),
                    rng=rng,
                )[0]
        out = classify_tracks(
            positions_to_tracks(pos, frame_interval_s=DT), frame_interval_s=DT, exposure_s=e
        )
        rows.append(
            pd.DataFrame(
                {
                    "N": N,
                    "x": x,
                    "alpha_true": a,
                    "alpha_msdkit": out["alpha"].to_numpy(),
                    "alpha_posterior": out["alpha_posterior"].to_numpy(),
                    "alpha_loglog": loglog_alpha(pos),
                }
            )
        )
    return pd.concat(rows, ignore_index=True)


def report_alpha(df: pd.DataFrame) -> None:
    df = df.assign(
        err_m=(df.alpha_msdkit - df.alpha_true).abs(),
        err_p=(df.alpha_posterior - df.alpha_true).abs(),
        err_l=(df.alpha_loglog - df.alpha_true).abs(),
    )
    print("\n## Per-track alpha, mean absolute error (Brownian + FBM alpha 0.1-1.9, 50-300 points, x 0-3)\n")
    print(
        "| subset | tracks | msdkit `alpha` (step likelihood) | msdkit `alpha_posterior` | "
        "log-log TA-MSD lags 1-10 | ratio alpha / log-log | ratio posterior / log-log |"
    )
    print("|---|---|---|---|---|---|---|")

    def line(name, g):
        print(
            f"| {name} | {len(g)} | {g.err_m.mean():.3f} | {g.err_p.mean():.3f} | {g.err_l.mean():.3f} | "
            f"{g.err_m.mean() / g.err_l.mean():.2f} | {g.err_p.mean() / g.err_l.mean():.2f} |"
        )

    line("all", df)
    for lo, hi in ((0, 1), (1, 2), (2, 3.01)):
        line(f"x {lo}-{hi:g}", df[(df.x >= lo) & (df.x < hi)])
    for lo, hi in ((50, 100), (100, 200), (200, 301)):
        line(f"{lo}-{hi - 1} points", df[(df.N >= lo) & (df.N < hi)])
    for lo, hi in ((0.1, 0.7), (0.7, 1.3), (1.3, 1.91)):
        line(f"alpha {lo}-{hi:.1f}", df[(df.alpha_true >= lo) & (df.alpha_true < hi)])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", type=int, default=200)
    ap.add_argument("--tracks-per-class", type=int, default=400)
    ap.add_argument("--alpha-tracks", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--only-flags", default="", help="comma-separated sample conditions; skip parts 2 and 3")
    args = ap.parse_args()
    if args.only_flags:
        report_sample_flags(run_sample_flags(args.samples, np.random.default_rng(args.seed),
                                             tuple(args.only_flags.split(","))))
        return
    rng = np.random.default_rng(args.seed)
    t0 = time.perf_counter()
    report_confusion(run_confusion(args.tracks_per_class, rng))
    t1 = time.perf_counter()
    report_alpha(run_alpha_mae(args.alpha_tracks, rng))
    t2 = time.perf_counter()
    report_sample_flags(run_sample_flags(args.samples, rng))
    t3 = time.perf_counter()
    print(
        f"\nruntime: confusion {t1 - t0:.0f} s, alpha {t2 - t1:.0f} s, sample flags {t3 - t2:.0f} s "
        f"(1 core, seed {args.seed})"
    )


if __name__ == "__main__":
    main()
