"""Sample motion flags on simulated movies, analysed as `msdkit run` does (prints a table).

Each scene is a recipe for msdkit's movie simulator (``msdkit.simulate``, like ``synthetic_movies/*.yaml``),
rendered to an OME-TIFF and analysed by :func:`msdkit.batch.run_batch` with a config that holds only the
inputs, ``acquisition`` and ``sample`` (every detection, linking and analysis setting automatic), exactly
as ``msdkit run CONFIG`` would. Scenes:

* Brownian controls: beads of 100-200 nm in water at 25 °C moving in 3D through a 4 µm slab around a 1 µm
  focal depth (30 frames/s, 15 ms exposure, like ``demo_beads_100nm.yaml``), bright and dim, several seeds;
* subdiffusive samples: tracers in a gel, fractional Brownian motion with alpha 0.5-0.7 in 2D (20 frames/s,
  20 ms exposure, like ``demo_subdiffusive_gel.yaml``);
* drifting Brownian samples: the bead scene with a stage drift (recipe ``drift_um_s``);
* a directed sample: particles moving at constant speed in random directions plus diffusion (recipe motion
  ``directed``).

Printed per movie: tracks, the sample alpha with its 95 % interval and the flags from the movie; the same
analysis (:func:`msdkit.pipeline.analyze_tracks`) on the simulator's ground truth, i.e. the true exposure-
averaged positions perfectly linked (every frame inside the image, tracks of >= 10 positions), which
separates what detection and linking do from what the analysis does; the truth; and whether the flags are
right (``ok``): Brownian controls carry none of subdiffusive / superdiffusive / confined / directed / drift,
subdiffusive samples carry ``subdiffusive`` and not ``superdiffusive``, drifting samples carry ``drift`` and
neither ``superdiffusive`` nor ``subdiffusive``, the directed sample carries ``directed`` or
``superdiffusive``.

A second table gives the per-track alpha of the movie's tracks (``track_fits.csv``: ``alpha_track`` from the
estimators, ``class_alpha`` from the motion classes, ``alpha_posterior`` the latter given the spread of alpha
over the sample's tracks, which is also the reported ``alpha``) as mean absolute error against the scene's true alpha,
beside a plain log-log fit of each track's time-averaged MSD over lags 1 to min(10, n/2) on the same tracks.

Run: python benchmarks/movie_flags.py [--scenes a,b] [--executor serial|local] [--cache DIR]
Rendered movies are cached in --cache (default: a folder in the system temp dir). One movie of 192 x 192 px
x 200-300 frames takes about half a minute on one core.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

from msdkit import pipeline
from msdkit.batch import run_batch
from msdkit.config import load_config
from msdkit.simulate.recipe import recipe_from_dict
from msdkit.simulate.scene import write_scene

MOTION_FLAGS = ("subdiffusive", "superdiffusive", "confined", "directed")

BEADS = {  # 3D beads through a slab, like synthetic_movies/demo_beads_100nm.yaml
    "frame_interval_s": 1.0 / 30.0,
    "exposure_s": 0.015,
    "optics": {
        "n_dims": 3,
        "wavelength_nm": 520,
        "numerical_aperture": 0.8,
        "focal_depth_um": 1.0,
        "slab_um": 4.0,
    },
    "n_frames": 200,
}
GEL = {  # 2D tracers in a gel, like synthetic_movies/demo_subdiffusive_gel.yaml
    "frame_interval_s": 0.05,
    "exposure_s": 0.02,
    "optics": {"n_dims": 2, "wavelength_nm": 520, "numerical_aperture": 0.8},
    "n_frames": 300,
}

#: name: (kind, base scene, seed, population, drift µm/s, truth text)
SCENES: dict[str, tuple] = {
    "beads_100nm_a": ("brownian", BEADS, 11, {"diameter_nm": 100, "photons": 3000}, (0, 0), "Brownian"),
    "beads_100nm_b": ("brownian", BEADS, 12, {"diameter_nm": 100, "photons": 3000}, (0, 0), "Brownian"),
    "beads_100nm_dim": ("brownian", BEADS, 13, {"diameter_nm": 100, "photons": 600}, (0, 0), "Brownian"),
    "beads_150nm": ("brownian", BEADS, 14, {"diameter_nm": 150, "photons": 2000}, (0, 0), "Brownian"),
    "beads_200nm_dim": ("brownian", BEADS, 15, {"diameter_nm": 200, "photons": 500}, (0, 0), "Brownian"),
    "gel_alpha_0.5": (
        "subdiffusive", GEL, 21,
        {"diameter_nm": 200, "photons": 2000, "motion": {"model": "fbm", "alpha": 0.5,
                                                         "K_um2_s_alpha": 0.05}},
        (0, 0), "FBM alpha 0.5",
    ),
    "gel_alpha_0.6": (
        "subdiffusive", GEL, 22,
        {"diameter_nm": 200, "photons": 1000, "motion": {"model": "fbm", "alpha": 0.6,
                                                         "K_um2_s_alpha": 0.05}},
        (0, 0), "FBM alpha 0.6",
    ),
    "gel_alpha_0.7": (
        "subdiffusive", GEL, 23,
        {"diameter_nm": 200, "photons": 2000, "motion": {"model": "fbm", "alpha": 0.7, "K_um2_s_alpha": 0.1}},
        (0, 0), "FBM alpha 0.7",
    ),
    "beads_200nm_drift": (
        "drift", BEADS, 31, {"diameter_nm": 200, "photons": 2000}, (1.5, 0.8), "Brownian + drift 1.7 µm/s",
    ),
    "beads_100nm_drift": (
        "drift", BEADS, 32, {"diameter_nm": 100, "photons": 3000}, (-2.0, 1.0), "Brownian + drift 2.2 µm/s",
    ),
    "directed": (
        "directed", GEL, 41,
        {"diameter_nm": 200, "photons": 2000,
         "motion": {"model": "directed", "speed_um_s": 0.5, "D_um2_s": 0.05}},
        (0, 0), "directed 0.5 µm/s, D 0.05",
    ),
}  # fmt: skip


def recipe(name: str, size: int):
    kind, base, seed, pop, drift, _ = SCENES[name]
    density = 50.0 / 256**2  # particles in view per pixel, as in the demo scenes
    return recipe_from_dict(
        {
            "name": name.replace(".", "_"),
            "seed": seed,
            "width_px": size,
            "height_px": size,
            "pixel_size_um": 0.166,
            "n_frames": base["n_frames"],
            "frame_interval_s": base["frame_interval_s"],
            "exposure_s": base["exposure_s"],
            "temperature_c": 25.0,
            "medium": "water",
            "drift_um_s": list(drift),
            "optics": base["optics"],
            "camera": {"background_photons": 20, "read_noise_electrons": 1.5, "offset_adu": 100},
            "populations": [
                {"label": name, "count_in_view": round(density * size * size, 1), "motion": "brownian", **pop}
            ],
        }
    )


def movie(rec, cache: Path) -> tuple[Path, Path]:
    """Rendered movie and truth table of a recipe (cached by the recipe's content)."""
    key = hashlib.sha1(json.dumps(rec.model_dump(mode="json"), sort_keys=True).encode()).hexdigest()[:12]
    folder = cache / f"{rec.name}_{key}"
    tif, truth = folder / f"{rec.name}.ome.tif", folder / f"{rec.name}_truth.csv"
    if not (tif.exists() and truth.exists()):
        write_scene(rec, folder)
    return tif, truth


def truth_tracks(truth_csv: Path, min_points: int = 10) -> pd.DataFrame:
    """The simulator's true positions, linked by particle identity, split where a particle left the image."""
    t = pd.read_csv(truth_csv).sort_values(["particle", "frame"], kind="stable")
    new = (t["particle"].diff() != 0) | (t["frame"].diff() != 1)
    t = t.assign(track=np.cumsum(new.to_numpy()))
    t = t[t.groupby("track")["frame"].transform("size") >= min_points]
    return t[["track", "frame", "x_um", "y_um"]].reset_index(drop=True)


def loglog_alpha(tracks: pd.DataFrame) -> pd.Series:
    """Plain log-log slope of each track's time-averaged MSD over lags 1..min(10, n/2) (frame pairs only)."""
    out = {}
    for tid, g in tracks.groupby("track"):
        f = g["frame"].to_numpy()
        xy = g[["x_um", "y_um"]].to_numpy()
        pos = np.full((f[-1] - f[0] + 1, 2), np.nan)
        pos[f - f[0]] = xy
        lags = np.arange(1, max(2, min(10, len(f) // 2)) + 1)
        sq = [np.sum((pos[n:] - pos[:-n]) ** 2, axis=1) for n in lags]
        msd = np.array([v[np.isfinite(v)].mean() if np.isfinite(v).any() else np.nan for v in sq])
        ok = np.isfinite(msd) & (msd > 0)
        if ok.sum() >= 2:
            out[tid] = float(np.polyfit(np.log(lags[ok]), np.log(msd[ok]), 1)[0])
    return pd.Series(out, dtype=float)


def alpha_errors(stack_dir: Path, alpha_true: float) -> dict:
    """Mean absolute error of per-track alpha (msdkit's two columns and a plain log-log fit)."""
    fits = pd.read_csv(stack_dir / "track_fits.csv").set_index("track")
    ll = loglog_alpha(pd.read_parquet(stack_dir / "tracks.parquet"))
    both = fits.index.intersection(ll.index)
    fits = fits.loc[both]
    err = lambda v: float(np.nanmean(np.abs(np.asarray(v, float) - alpha_true)))  # noqa: E731
    return {
        "n_alpha_tracks": int(len(both)),
        "mae_alpha": err(fits["alpha_track"] if "alpha_track" in fits.columns else fits["alpha"]),
        "mae_class_alpha": err(fits["class_alpha"]),
        "mae_alpha_posterior": err(fits["alpha_posterior"]),
        "mae_loglog": err(ll.loc[both]),
    }


def verdict(kind: str, flags: set) -> bool:
    motion = flags & set(MOTION_FLAGS)
    if kind == "brownian":
        return not motion and "drift" not in flags
    if kind == "subdiffusive":
        return "subdiffusive" in flags and "superdiffusive" not in flags
    if kind == "drift":
        return "drift" in flags and not ({"superdiffusive", "subdiffusive"} & flags)
    if kind == "directed":
        return bool({"directed", "superdiffusive"} & flags) and "subdiffusive" not in flags
    raise ValueError(kind)


def run(names: list[str], size: int, cache: Path, executor: str) -> pd.DataFrame:
    work = Path(tempfile.mkdtemp(prefix="msdkit_movie_flags_"))
    try:
        return _run(names, size, cache, executor, work)
    finally:
        shutil.rmtree(work, ignore_errors=True)


def _run(names: list[str], size: int, cache: Path, executor: str, work: Path) -> pd.DataFrame:
    recs = {n: recipe(n, size) for n in names}
    rows = []
    for n in names:
        rec = recs[n]
        t0 = time.perf_counter()
        tif, truth_csv = movie(rec, cache)
        t_render = time.perf_counter() - t0
        cfg_path = work / f"{rec.name}.yaml"
        cfg_path.write_text(
            yaml.safe_dump(
                {
                    "inputs": [str(tif)],
                    "output_dir": str(work / "results"),
                    "acquisition": {
                        "pixel_size_um": rec.pixel_size_um,
                        "frame_interval_s": rec.frame_interval_s,
                        "exposure_s": rec.exposure_s,
                    },
                    "sample": {"temperature_c": rec.temperature_c, "medium": "water"},
                    "executor": {"kind": executor},
                }
            )
        )
        t0 = time.perf_counter()
        res = run_batch(load_config(cfg_path), force=True, progress="off")
        t_run = time.perf_counter() - t0
        row = res.rows[0]
        if row.status != "ok":
            raise RuntimeError(f"{n}: {row.error}")
        summ = json.loads((work / "results" / row.stack / "summary.json").read_text())
        tr = truth_tracks(truth_csv)
        ref = pipeline.analyze_tracks(
            tr, frame_interval_s=rec.frame_interval_s, exposure_s=rec.exposure_s, temperature_c=25.0
        ).summary
        kind = SCENES[n][0]
        pop = rec.populations[0].motion
        alpha_true = {"brownian": 1.0, "fbm": getattr(pop, "alpha", np.nan)}.get(pop.model, np.nan)
        errs = alpha_errors(work / "results" / row.stack, alpha_true) if np.isfinite(alpha_true) else {}
        rows.append(
            {
                "scene": n,
                "kind": kind,
                "truth": SCENES[n][5],
                "n_tracks": summ["n_tracks"],
                "alpha": summ["alpha"],
                "alpha_lo": summ["alpha_ci95"][0],
                "alpha_hi": summ["alpha_ci95"][1],
                "flags": ";".join(summ["flags"]),
                "drift_um_s": float(np.hypot(*summ["drift_um_s"])),
                "ok": verdict(kind, set(summ["flags"])),
                "truth_n_tracks": ref["n_tracks"],
                "truth_alpha": ref["alpha"],
                "truth_alpha_lo": ref["alpha_ci95"][0],
                "truth_alpha_hi": ref["alpha_ci95"][1],
                "truth_flags": ";".join(ref["flags"]),
                "truth_ok": verdict(kind, set(ref["flags"])),
                "alpha_true": alpha_true,
                **errs,
                "t_render_s": t_render,
                "t_run_s": t_run,
            }
        )
        r = rows[-1]
        print(
            f"{n}: alpha {r['alpha']:.3f} [{r['alpha_lo']:.3f}, {r['alpha_hi']:.3f}], flags "
            f"{r['flags'] or '-'}; true tracks: alpha {r['truth_alpha']:.3f}, flags "
            f"{r['truth_flags'] or '-'} "
            f"(render {t_render:.0f} s, msdkit run {t_run:.0f} s)",
            flush=True,
        )
    return pd.DataFrame(rows)


def report(df: pd.DataFrame, size: int) -> None:
    print(
        f"\n## Sample flags on simulated movies ({size} x {size} px; `msdkit run` with only acquisition and "
        "sample set)\n"
    )
    print(
        "| movie | truth | tracks | alpha [95 % interval] | flags | ok | true tracks: alpha [95 %] | "
        "flags | ok |"
    )
    print("|---|---|---|---|---|---|---|---|---|")
    for _, r in df.iterrows():
        print(
            f"| {r.scene} | {r.truth} | {r.n_tracks} | {r.alpha:.3f} [{r.alpha_lo:.3f}, {r.alpha_hi:.3f}] | "
            f"{r['flags'].replace(';', ', ') or '–'} | {'yes' if r.ok else '**no**'} | "
            f"{r.truth_alpha:.3f} [{r.truth_alpha_lo:.3f}, {r.truth_alpha_hi:.3f}] | "
            f"{r['truth_flags'].replace(';', ', ') or '–'} | {'yes' if r.truth_ok else '**no**'} |"
        )
    a = df[np.isfinite(df["alpha_true"])]
    if len(a):
        print(
            "\n## Per-track alpha on the movies' tracks: mean absolute error against the true alpha\n\n"
            "| movie | true alpha | tracks | msdkit `alpha` | msdkit `class_alpha` | "
            "msdkit `alpha_posterior` | plain log-log TA-MSD |\n|---|---|---|---|---|---|---|"
        )
        for _, r in a.iterrows():
            print(
                f"| {r.scene} | {r.alpha_true:g} | {int(r.n_alpha_tracks)} | {r.mae_alpha:.3f} | "
                f"{r.mae_class_alpha:.3f} | {r.mae_alpha_posterior:.3f} | {r.mae_loglog:.3f} |"
            )
        w = a["n_alpha_tracks"].to_numpy(float)
        print(
            f"| all (track-weighted) | | {int(w.sum())} | {np.average(a.mae_alpha, weights=w):.3f} | "
            f"{np.average(a.mae_class_alpha, weights=w):.3f} | "
            f"{np.average(a.mae_alpha_posterior, weights=w):.3f} | "
            f"{np.average(a.mae_loglog, weights=w):.3f} |"
        )
    print(
        f"\nflags right on {int(df.ok.sum())} of {len(df)} movies (on the true tracks: "
        f"{int(df.truth_ok.sum())} of {len(df)}); msdkit run {df.t_run_s.sum():.0f} s in total"
    )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenes", default=",".join(SCENES))
    ap.add_argument("--size", type=int, default=192)
    ap.add_argument("--executor", default="serial", choices=("serial", "local"))
    ap.add_argument("--cache", default=os.path.join(tempfile.gettempdir(), "msdkit_bench_movie_flags"))
    a = ap.parse_args()
    df = run(a.scenes.split(","), a.size, Path(a.cache), a.executor)
    report(df, a.size)


if __name__ == "__main__":
    main()
