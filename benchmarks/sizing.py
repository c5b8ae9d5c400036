"""Accuracy of size distributions on simulated tracks with known truth.

Prints tables for: a monodisperse 100 nm sample, a log-normal sample (CMD 100 nm, σ_g 1.2), an 80 + 250 nm
mixture, and the bias of short tracks and minimum-length filters. Tracks: 30 fps, 15 ms exposure, 25 nm
localisation error, water at 25 °C, 1,000 tracks of 5–30 steps unless stated.

    python benchmarks/sizing.py [--seeds 3]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from msdkit import hydro, sizing
from msdkit.simulate import brownian_positions, positions_to_tracks

DT, EXPOSURE, SIGMA, T_C = 1 / 30, 0.015, 0.025, 25.0
ETA = hydro.water_viscosity_mpa_s(T_C)
KW = dict(temperature_c=T_C, viscosity_mpa_s=ETA, frame_interval_s=DT, exposure_s=EXPOSURE)
HATCH_CHOATE = (79.16, 100.00, 126.32)  # CMD 100 nm, σ_g 1.2 (METHODS.md)


def D_of(d_nm):
    return hydro.stokes_einstein_D_um2_s(np.asarray(d_nm, float) / 2, temperature_c=T_C, viscosity_mpa_s=ETA)


def simulate(diameters_nm, rng, *, n_steps=None, steps=(5, 30)):
    g = np.random.default_rng(rng)
    n = len(diameters_nm)
    n_steps = g.integers(steps[0], steps[1] + 1, n) if n_steps is None else np.asarray(n_steps)
    pos = brownian_positions(
        n,
        int(n_steps.max()) + 1,
        D_um2_s=D_of(diameters_nm),
        frame_interval_s=DT,
        exposure_s=EXPOSURE,
        localization_sd_um=SIGMA,
        rng=g,
    )
    return positions_to_tracks(pos, frame_interval_s=DT, lengths=n_steps + 1)


def analyse(tracks, *, known_sigma=True, **kw):
    est = sizing.lag1_track_estimates(
        tracks, frame_interval_s=DT, exposure_s=EXPOSURE, localization_sd_um=SIGMA if known_sigma else None
    )
    t0 = time.perf_counter()
    dist = sizing.size_distribution(est, **KW, **kw)
    return dist, time.perf_counter() - t0


def q3(s):
    return f"{s.d10_nm:6.1f} {s.d50_nm:6.1f} {s.d90_nm:6.1f}"


def monodisperse(seeds):
    print("\n## Monodisperse 100 nm, 1,000 tracks of 5–30 steps (targets: span ≤ 0.15, D50 within 3 %)")
    print(
        "seed sigma    | raw d10    d50    d90  span | deconv d10 d50    d90  span | D50 err | sample "
        "| s   | ok"
    )
    for seed in seeds:
        tracks = simulate(np.full(1000, 100.0), seed)
        for known in (True, False):
            d, t = analyse(tracks, known_sigma=known)
            err = d.d50_nm / 100 - 1
            ok = d.span <= 0.15 and abs(err) <= 0.03
            print(
                f"{seed:4d} {'given ' if known else 'pooled'} | {q3(d.raw)} {d.raw.span:5.3f} | "
                f"{q3(d.number)} {d.span:5.3f} | {err:+6.1%} | {d.sample_diameter_nm:6.1f} | {t:4.1f} | "
                f"{'yes' if ok else 'NO'}"
            )


def lognormal(seeds):
    print("\n## Log-normal CMD 100 nm, σ_g 1.2 (target: D10/D50/D90 within 5 % of 79.16/100.00/126.32)")
    print(
        "seed | raw d10    d50    d90 | deconv d10 d50    d90 | errors (%)           | volume d50 | s   | ok"
    )
    for seed in seeds:
        g = np.random.default_rng(1000 + seed)
        d_true = np.exp(np.log(100.0) + np.log(1.2) * g.standard_normal(1000))
        d, t = analyse(simulate(d_true, seed))
        errs = np.array([d.d10_nm, d.d50_nm, d.d90_nm]) / np.array(HATCH_CHOATE) - 1
        ok = np.all(np.abs(errs) <= 0.05)
        print(
            f"{seed:4d} | {q3(d.raw)} | {q3(d.number)} | {' '.join(f'{e:+5.1%}' for e in errs)} | "
            f"{d.volume.d50_nm:10.1f} | {t:4.1f} | {'yes' if ok else 'NO'}"
        )


def bimodal(seeds):
    print(
        "\n## Mixture 80 + 250 nm, half and half by number (targets: modes within 10 %, fractions within 0.1)"
    )
    print("seed | raw d10    d50    d90 | modes (nm)      | fractions   | true frac 80 | strength | s   | ok")
    for seed in seeds:
        g = np.random.default_rng(2000 + seed)
        d_true = np.where(g.random(1000) < 0.5, 80.0, 250.0)
        d, t = analyse(simulate(d_true, seed))
        modes, fr = d.number.modes_nm, d.number.mode_fractions
        true80 = float(np.mean(d_true == 80.0))
        ok = (
            len(modes) == 2
            and abs(modes[0] / 80 - 1) <= 0.1
            and abs(modes[1] / 250 - 1) <= 0.1
            and abs(fr[0] - true80) <= 0.1
        )
        print(
            f"{seed:4d} | {q3(d.raw)} | {' '.join(f'{m:6.1f}' for m in modes):15s} | "
            f"{' '.join(f'{f:.3f}' for f in fr):11s} | {true80:12.3f} | "
            f"{d.method['regularization_strength']:8.0e} "
            f"| {t:4.1f} | {'yes' if ok else 'NO'}"
        )


def short_track_bias():
    print("\n## Short tracks: per-track sizes of identical particles (analytic, 2D, no noise)")
    print("N_s | apparent d10  d50   d90 (× true) | mean of per-track sizes (× true)")
    for n in (5, 10, 20, 50, 100):
        q = sizing.apparent_size_quantiles(n)
        print(f"{n:3d} | {q[0]:12.3f} {q[1]:5.3f} {q[2]:5.3f} | {n / (n - 1):.3f}")


def filter_bias(seed=0):
    print(
        "\n## Minimum-length filters: 80 + 250 nm, equal numbers in the sample, tracks end when particles "
        "leave a "
        "3 µm focal slab"
    )
    print(
        "(visits ∝ D, mean visit L²/(12 D): 80 nm ≈ 3.7 frames, 250 nm ≈ 11.5 frames; "
        "true 80 nm fraction 0.50)"
    )
    print("min points | tracks | 80 nm fraction: by time | by track")
    g = np.random.default_rng(seed)
    slab_um = 3.0
    lengths, diam = [], []
    for d in (80.0, 250.0):
        D = float(D_of(d))
        n_visits = int(round(600 * D / float(D_of(80.0))))
        mean_frames = slab_um**2 / (12 * D) / DT
        lengths.append(1 + g.geometric(1.0 / mean_frames, n_visits))
        diam.append(np.full(n_visits, d))
    lengths, diam = np.concatenate(lengths), np.concatenate(diam)
    lengths = np.minimum(lengths, 200)
    tracks_all = simulate(diam, seed + 1, n_steps=lengths - 1)
    for min_points in (3, 10, 20):
        counts = tracks_all.groupby("track")["frame"].transform("size")
        tracks = tracks_all[counts >= min_points]
        out = []
        for weighting in ("time", "track"):
            d, _ = analyse(tracks, weighting=weighting)
            modes, fr = d.number.modes_nm, d.number.mode_fractions
            small = [f for m, f in zip(modes, fr, strict=True) if m < 150]
            out.append(sum(small) if len(modes) > 1 else float("nan"))
        print(f"{min_points:10d} | {tracks['track'].nunique():6d} | {out[0]:23.3f} | {out[1]:8.3f}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=3)
    args = parser.parse_args()
    seeds = range(args.seeds)
    t0 = time.perf_counter()
    monodisperse(seeds)
    lognormal(seeds)
    bimodal(seeds)
    short_track_bias()
    filter_bias()
    print(f"\ntotal {time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    main()
