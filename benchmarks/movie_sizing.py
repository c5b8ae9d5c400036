"""Sizing on simulated movies with known truth, analysed exactly as ``msdkit run`` does.

Scenes (msdkit's simulator: 256 x 256 px of 0.166 µm, 30 frames/s, 15 ms exposure, particles moving in 3D
through a slab so they fade in and out of focus; 300 frames unless changed):

* ``beads_37c``: 100 nm beads in water at 37 °C (η 0.6913 mPa·s, D 6.572 µm²/s);
* ``beads_3mpas``: 200 nm beads in a medium of fixed viscosity 3 mPa·s at 25 °C (D 0.7280 µm²/s);
* ``beads_100nm``: 100 nm beads in water at 25 °C (D 4.907 µm²/s);
* ``mix_1_1``, ``mix_3_1``, ``mix_1_3``: 80 + 250 nm particles in water at 25 °C (D 6.134 and 1.963 µm²/s),
  1:1, 3:1 and 1:3 by number in view, each population with a 10 % log-normal size spread and brightness
  ∝ d² (the scene of synthetic_movies/demo_mixture_80_250nm.yaml).

Truth values: Stokes–Einstein with water viscosity from msdkit.hydro (IAPWS 2008 / Pátek 2009; METHODS.md
check values 25 °C 0.89002, 37 °C 0.69130 mPa·s). Every movie is written as OME-TIFF and analysed by
``msdkit.pipeline.process_input`` with a config holding only ``acquisition`` and ``sample`` (all detection,
linking and analysis settings automatic). Printed per movie: viscosity used vs truth; the sample D and
radius (summary.json) vs truth; the deconvolved number distribution (modes, their number fractions,
D10/D50/D90, span); for mixtures the true 80 nm share of particles in focus (time-weighted, from the
simulator's truth table); and, for comparison, the distribution the earlier method gave on the same tracks
(tracks of ≥ 10 points only, a kernel of clean Brownian steps, no splitting at wrong joins).

Targets (issue 5): viscosity within 1 %, radii within 7 %, the mixtures show two modes (each within 10 %).

    python benchmarks/movie_sizing.py [--seeds 1] [--frames 300] [--scenes beads_37c,mix_1_1,...]

Movies are cached in --cache (default: a folder in the system temp dir).
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import tempfile
import time
from pathlib import Path

import pandas as pd

from msdkit import hydro, pipeline, sizing
from msdkit.config import config_from_dict
from msdkit.simulate.recipe import recipe_from_dict
from msdkit.simulate.scene import write_scene

D_SMALL, D_LARGE = 80.0, 250.0


def _population(label, count, diameter, photons, spread=1.0, brightness_exponent=0.0):
    return {
        "label": label,
        "count_in_view": count,
        "diameter_nm": diameter,
        "diameter_geometric_sd": spread,
        "photons": photons,
        "brightness_exponent": brightness_exponent,
        "motion": "brownian",
    }


def _mixture(n_small, n_large):
    return [
        _population("small_80nm", n_small, D_SMALL, 2500, 1.1, 2),
        _population("large_250nm", n_large, D_LARGE, 6000, 1.1, 2),
    ]


BEAD_OPTICS = {"focal_depth_um": 1.0, "slab_um": 4.0}
MIX_OPTICS = {"focal_depth_um": 1.5, "slab_um": 5.0}

#: name → (description, temperature °C, medium, optics changes, populations)
SCENES = {
    "beads_37c": (
        "100 nm beads, water, 37 °C",
        37.0,
        "water",
        BEAD_OPTICS,
        [_population("beads_100nm", 50, 100.0, 3000)],
    ),
    "beads_3mpas": (
        "200 nm beads, 3 mPa·s, 25 °C",
        25.0,
        {"viscosity_mpa_s": 3.0},
        BEAD_OPTICS,
        [_population("beads_200nm", 40, 200.0, 3000)],
    ),
    "beads_100nm": (
        "100 nm beads, water, 25 °C",
        25.0,
        "water",
        BEAD_OPTICS,
        [_population("beads_100nm", 50, 100.0, 3000)],
    ),
    "mix_1_1": ("80 + 250 nm, 1:1", 25.0, "water", MIX_OPTICS, _mixture(25, 25)),
    "mix_3_1": ("80 + 250 nm, 3:1", 25.0, "water", MIX_OPTICS, _mixture(36, 12)),
    "mix_1_3": ("80 + 250 nm, 1:3", 25.0, "water", MIX_OPTICS, _mixture(12, 36)),
}


def recipe(name: str, seed: int, n_frames: int, size: int):
    desc, temp_c, medium, optics, pops = SCENES[name]
    return recipe_from_dict(
        {
            "name": f"{name}_s{seed}",
            "seed": seed,
            "width_px": size,
            "height_px": size,
            "pixel_size_um": 0.166,
            "n_frames": n_frames,
            "frame_interval_s": 1.0 / 30.0,
            "exposure_s": 0.015,
            "temperature_c": temp_c,
            "medium": medium,
            "optics": {"n_dims": 3, "wavelength_nm": 520, "numerical_aperture": 0.8, **optics},
            "camera": {"background_photons": 20, "read_noise_electrons": 1.5, "offset_adu": 100},
            "populations": pops,
        }
    )


def movie(rec, cache: Path) -> tuple[Path, pd.DataFrame]:
    key = hashlib.sha1(json.dumps(rec.model_dump(mode="json"), sort_keys=True).encode()).hexdigest()[:12]
    folder = cache / f"{rec.name}_{key}"
    tif = folder / f"{rec.name}.ome.tif"
    if not tif.exists():
        write_scene(rec, folder)
    return tif, pd.read_csv(folder / f"{rec.name}_truth.csv")


def earlier_method(tracks: pd.DataFrame, rec, viscosity: float) -> sizing.SizeDistribution:
    """Lag-1 estimates of the ≥ 10-point tracks, clean-Brownian kernel, no splitting (before issue 5)."""
    kw = dict(frame_interval_s=rec.frame_interval_s, exposure_s=rec.exposure_s)
    est = sizing.lag1_track_estimates(tracks, **kw)
    return sizing.size_distribution(est, temperature_c=rec.temperature_c, viscosity_mpa_s=viscosity, **kw)


def run_one(name: str, seed: int, n_frames: int, size: int, cache: Path) -> dict:
    rec = recipe(name, seed, n_frames, size)
    tif, truth = movie(rec, cache)
    desc, temp_c, medium, _, pops = SCENES[name]
    cfg = config_from_dict(
        {
            "inputs": [str(tif)],
            "output_dir": str(tif.parent / "results"),
            "acquisition": {"pixel_size_um": 0.166, "frame_interval_s": 1.0 / 30.0, "exposure_s": 0.015},
            "sample": {"temperature_c": temp_c, "medium": medium},
        }
    )
    t0 = time.perf_counter()
    stack_dir = tif.parent / "results" / rec.name
    pipeline.process_input(tif, cfg, stack_dir, stack_name=rec.name)
    t_run = time.perf_counter() - t0
    summary = json.loads((stack_dir / "summary.json").read_text())
    tracks = pd.read_parquet(stack_dir / "tracks.parquet")
    eta_true = rec.viscosity_mpa_s()
    diam_true = [p["diameter_nm"] for p in pops]
    D_true = [
        float(hydro.stokes_einstein_D_um2_s(d / 2, temperature_c=temp_c, viscosity_mpa_s=eta_true))
        for d in diam_true
    ]
    infocus = truth[truth["in_focus"]]
    small_share = float((infocus["diameter_nm"] < 150).mean()) if len(pops) > 1 else float("nan")
    old = earlier_method(tracks, rec, summary["viscosity_mpa_s"])
    sd = summary["size_distribution"]
    return {
        "scene": name,
        "seed": seed,
        "desc": desc,
        "eta_used": summary["viscosity_mpa_s"],
        "eta_true": eta_true,
        "D": summary["D_um2_s"],
        "D_true": D_true,
        "radius_nm": summary["radius_nm"],
        "diam_true": diam_true,
        "n_tracks": summary["n_tracks"],
        "number": sd["number"],
        "method": sd["method"],
        "small_share_true": small_share,
        "old_modes": list(old.number.modes_nm),
        "old_fractions": list(old.number.mode_fractions),
        "old_span": old.span,
        "t_run_s": t_run,
    }


def fmt_list(values, f="{:.0f}"):
    return "/".join(f.format(v) for v in values) if values else "–"


def verdict(r) -> str:
    ok_eta = abs(r["eta_used"] / r["eta_true"] - 1) <= 0.01
    if len(r["diam_true"]) == 1:
        ok_r = abs(r["radius_nm"] / (r["diam_true"][0] / 2) - 1) <= 0.07
        ok_d50 = abs(r["number"]["d50_nm"] / r["diam_true"][0] - 1) <= 0.07
        return "yes" if ok_eta and ok_r and ok_d50 else "NO"
    modes = r["number"]["modes_nm"]
    ok = ok_eta and len(modes) == 2
    if ok:
        ok = abs(modes[0] / D_SMALL - 1) <= 0.10 and abs(modes[1] / D_LARGE - 1) <= 0.10
    return "yes" if ok else "NO"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=1)
    ap.add_argument("--first-seed", type=int, default=201)
    ap.add_argument("--frames", type=int, default=300)
    ap.add_argument("--size", type=int, default=256)
    ap.add_argument("--scenes", default=",".join(SCENES))
    ap.add_argument("--cache", default=os.path.join(tempfile.gettempdir(), "msdkit_bench_movie_sizing"))
    a = ap.parse_args()
    cache = Path(a.cache)
    rows = []
    t_all = time.perf_counter()
    for name in a.scenes.split(","):
        for k in range(a.seeds):
            r = run_one(name, a.first_seed + k, a.frames, a.size, cache)
            rows.append(r)
            n = r["number"]
            print(
                f"{name} seed {r['seed']}: modes {fmt_list(n['modes_nm'])} nm, fractions "
                f"{fmt_list(n['mode_fractions'], '{:.2f}')}, D50 {n['d50_nm']:.1f}, span {n['span']:.2f}, "
                f"radius {r['radius_nm']:.1f} nm, cuts {r['method'].get('n_cuts')}, {r['t_run_s']:.0f} s",
                flush=True,
            )
    print(
        f"\nMovies of {a.size} x {a.size} px x {a.frames} frames, configs with acquisition + sample only; "
        "errors in % of the truth. D and radius: summary.json; distribution: deconvolved number-weighted.\n"
    )
    head = (
        "| movie | η used / true (mPa·s) | D / true (µm²/s) | radius / true (nm) | modes (nm) | fractions "
        "(true 80 nm share in focus) | D10/D50/D90 (nm) | span | earlier method: modes, span | ok |"
    )
    print(head)
    print("|---" * (head.count("|") - 1) + "|")
    for r in rows:
        n = r["number"]
        eta_err = 100 * (r["eta_used"] / r["eta_true"] - 1)
        eta = f"{r['eta_used']:.4f} / {r['eta_true']:.4f} ({eta_err:+.2f} %)"
        if len(r["diam_true"]) == 1:
            D = f"{r['D']:.3f} / {r['D_true'][0]:.3f} ({100 * (r['D'] / r['D_true'][0] - 1):+.1f} %)"
            rad = (
                f"{r['radius_nm']:.1f} / {r['diam_true'][0] / 2:.0f} "
                f"({100 * (r['radius_nm'] / (r['diam_true'][0] / 2) - 1):+.1f} %)"
            )
            frac = fmt_list(n["mode_fractions"], "{:.2f}")
        else:
            D = f"{r['D']:.3f} / {fmt_list(r['D_true'], '{:.2f}')}"
            rad = f"{r['radius_nm']:.1f} / 40 + 125"
            frac = f"{fmt_list(n['mode_fractions'], '{:.2f}')} ({r['small_share_true']:.2f})"
        q = f"{n['d10_nm']:.0f}/{n['d50_nm']:.0f}/{n['d90_nm']:.0f}"
        old = f"{fmt_list(r['old_modes'])}, {r['old_span']:.2f}"
        print(
            f"| {r['scene']} (seed {r['seed']}) | {eta} | {D} | {rad} | {fmt_list(n['modes_nm'])} | {frac} | "
            f"{q} | {n['span']:.2f} | {old} | {verdict(r)} |"
        )
    print(f"\ntotal {time.perf_counter() - t_all:.0f} s")


if __name__ == "__main__":
    main()
