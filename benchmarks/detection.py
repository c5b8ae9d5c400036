"""Movie → D with automatic settings on simulated movies of 100 nm beads in water at 25 °C, across scenes.

Each scene is rendered by msdkit's simulator (pixel 0.166 µm, 30 frames/s, 15 ms exposure unless changed, 3D
motion through a slab so particles fade in and out of focus; 256 x 256 px, 200 frames unless changed) and
varied one factor at a time around the demo scene: photons per particle, background, density, focal depth (how
fast particles fade), PSF width, read noise and camera offset, 8-bit data, exposure (25 ms and the whole frame
interval: long exposures blur the spots). Detection and linking run with nothing set (as ``msdkit run`` does:
settings from 40 sampled frames, detection in chunks), then the pipeline's own analysis
(:func:`msdkit.pipeline.analyze_tracks`: drift, the "auto" estimator, Stokes–Einstein). Printed per scene:

* D and radius against the Stokes–Einstein truth (D = 4.9073 µm²/s, radius 50 nm: METHODS.md, computed
  from IAPWS 2008), averaged over the seeds;
* ``truth-level``: the pooled covariance-based estimator (Vestergaard, Blainey & Flyvbjerg 2014, Phys. Rev. E
  89:022726) on every true exposure-averaged position of the simulation, all steps inside the image: on a
  finite field it is biased low by about 1.4 x step SD / field width (steps crossing the edge are never
  seen), which the cut at the field edge in msdkit.link removes;
* ``perfect links``: the same estimator (msdkit.fit.fit_sample, covariance) on the detected spots joined by
  their true identity, cut at the field edge like the tracks: what detection alone does to D;
* ``linking``: the same estimator on the tracks divided by that on perfect links, minus 1: what linking
  alone does to D (wrong joins add too long steps, new spots nearer than a successor take long steps away);
* tracks, spots per frame, detection recall in focus, and the wrong-join rate (consecutive points of a track
  that are different true particles, among points matched one-to-one to the truth within 3 px);
* the covariance-based D at three fixed joining radii (3.8 / 4.2 / 4.6 step SDs), to show how the balance
  between wrong joins and lost long steps moves with the scene (the automatic radius adapts to it).

Run: python benchmarks/detection.py [--seeds 2] [--frames 200] [--size 256] [--scenes demo,dense,...]
Rendered movies and spots are cached in --cache (default: a folder in the system temp dir).
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import pickle
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.optimize import linear_sum_assignment
from scipy.spatial import cKDTree

from msdkit import detect, fit, link, pipeline
from msdkit.simulate.recipe import recipe_from_dict
from msdkit.simulate.scene import render_scene

D_TRUE = 4.9073  # µm²/s, 100 nm in water at 25 °C (METHODS.md, computed from IAPWS 2008)
RADIUS_TRUE_NM = 50.0
SCAN_ACCEPTANCE_SD = (3.8, 4.2, 4.6)
LONG_MIN_POINTS = 10  # linking.min_track_points: tracks analysed for alpha, classes and per-track fits
SAMPLE_MIN_POINTS = 3  # analysis.sample_min_track_points: tracks pooled into the sample D

#: Scene variations: (description, changes to the demo recipe, bit depth of the saved movie).
SCENES: dict[str, tuple[str, dict, int]] = {
    "demo": ("3000 photons, bg 20, 50 in focus, focal depth 1 µm, NA 0.8", {}, 16),
    "dim": ("500 photons", {"photons": 500}, 16),
    "bright": ("5000 photons, bg 5", {"photons": 5000, "background_photons": 5}, 16),
    "high_bg": ("background 100 photons/px", {"background_photons": 100}, 16),
    "sparse": ("20 in focus", {"count_in_view": 20}, 16),
    "dense": ("100 in focus", {"count_in_view": 100}, 16),
    "fast_fading": ("focal depth 0.6 µm", {"focal_depth_um": 0.6}, 16),
    "slow_fading": ("focal depth 2 µm (slab 8 µm)", {"focal_depth_um": 2.0, "slab_um": 8.0}, 16),
    "wide_psf": ("NA 0.6", {"numerical_aperture": 0.6}, 16),
    "narrow_psf": ("NA 1.2", {"numerical_aperture": 1.2}, 16),
    "noisy_camera": ("read noise 10 e-, offset 500", {"read_noise_electrons": 10.0, "offset_adu": 500}, 16),
    "8bit": ("8-bit data, gain 0.2 ADU/e-, offset 10", {"gain_adu_per_electron": 0.2, "offset_adu": 10}, 8),
    "very_dim": ("250 photons", {"photons": 250}, 16),
    "low_snr": ("400 photons, bg 60, read noise 6 e-",
                {"photons": 400, "background_photons": 60, "read_noise_electrons": 6.0}, 16),
    "exposure_25ms": ("exposure 25 ms of the 33 ms frame", {"exposure_s": 0.025}, 16),
    "full_exposure": ("exposure = frame interval (33 ms)", {"exposure_s": 1.0 / 30.0}, 16),
    "full_exposure_dim": ("exposure = frame interval, 600 photons, bg 60, read noise 6 e-",
                          {"exposure_s": 1.0 / 30.0, "photons": 600, "background_photons": 60,
                           "read_noise_electrons": 6.0}, 16),
}


def recipe(seed: int, n_frames: int, size: int, changes: dict | None = None):
    """The demo scene (synthetic_movies/demo_beads_100nm.yaml) with ``changes`` applied."""
    ch = dict(changes or {})
    exposure_s = ch.pop("exposure_s", 0.015)
    optics = {
        "n_dims": 3,
        "wavelength_nm": 520,
        "numerical_aperture": 0.8,
        "focal_depth_um": 1.0,
        "slab_um": 4.0,
    }
    camera = {
        "background_photons": 20,
        "read_noise_electrons": 1.5,
        "gain_adu_per_electron": 1.0,
        "offset_adu": 100,
    }
    population = {
        "label": "beads_100nm",
        "count_in_view": 50.0,
        "diameter_nm": 100,
        "photons": 3000,
        "motion": "brownian",
    }
    for key, value in ch.items():
        for section in (optics, camera, population):
            if key in section:
                section[key] = value
                break
        else:
            raise KeyError(key)
    return recipe_from_dict(
        {
            "name": f"bench_beads_{seed}",
            "seed": seed,
            "width_px": size,
            "height_px": size,
            "pixel_size_um": 0.166,
            "n_frames": n_frames,
            "frame_interval_s": 1.0 / 30.0,
            "exposure_s": exposure_s,
            "temperature_c": 25.0,
            "medium": "water",
            "optics": optics,
            "camera": camera,
            "populations": [population],
        }
    )


def covariance_D(x: np.ndarray, frames: np.ndarray, track: np.ndarray, dt: float) -> float:
    """Pooled covariance-based D over all consecutive steps (and consecutive step pairs) of all tracks."""
    order = np.lexsort((frames, track))
    x, frames, track = x[order], frames[order], track[order]
    step = np.diff(x, axis=0)
    ok = (np.diff(frames) == 1) & (np.diff(track) == 0)
    pair = ok[:-1] & ok[1:]
    n_dims = x.shape[1]
    sq = float((step[ok] ** 2).sum()) / (n_dims * ok.sum())
    prod = float((step[:-1][pair] * step[1:][pair]).sum()) / (n_dims * pair.sum())
    return sq / (2 * dt) + prod / dt


def sample_D(tracks_px: pd.DataFrame, px: float, dt: float, exposure_s: float) -> float:
    """Pooled covariance-based D (msdkit.fit.fit_sample) of a track table in pixels."""
    t = pd.DataFrame(
        {
            "track": tracks_px["track"].to_numpy(),
            "frame": tracks_px["frame"].to_numpy(),
            "x_um": tracks_px["x_px"].to_numpy() * px,
            "y_um": tracks_px["y_px"].to_numpy() * px,
        }
    )
    return fit.fit_sample(
        t, None, frame_interval_s=dt, exposure_s=exposure_s, method="covariance", n_boot=0
    ).D_um2_s


def assign_to_truth(
    table: pd.DataFrame, tx: np.ndarray, ty: np.ndarray, truth: pd.DataFrame, radius_px: float = 3.0
) -> np.ndarray:
    """Row of the truth each spot is (one-to-one per frame, within ``radius_px``), -1 when none."""
    out = np.full(len(table), -1)
    fr = table["frame"].to_numpy()
    xy = table[["x_px", "y_px"]].to_numpy()
    for f, rows in truth.groupby("frame").indices.items():
        si = np.nonzero(fr == f)[0]
        if si.size == 0:
            continue
        tree = cKDTree(np.column_stack([tx[rows], ty[rows]]))
        pairs = tree.sparse_distance_matrix(cKDTree(xy[si]), radius_px, output_type="coo_matrix")
        if pairs.nnz == 0:
            continue
        cost = np.full((len(rows), len(si)), 1e6)
        cost[pairs.row, pairs.col] = pairs.data**2
        a, b = linear_sum_assignment(cost)
        ok = cost[a, b] < 1e6
        out[si[b[ok]]] = rows[a[ok]]
    return out


def rendered(rec, bits: int, cache: Path):
    """Frames, truth and spots of a recipe (cached)."""
    key = hashlib.sha1(
        (json.dumps(rec.model_dump(mode="json"), sort_keys=True) + str(bits)).encode()
    ).hexdigest()
    path = cache / f"{key[:16]}.pkl"
    if path.exists():
        with open(path, "rb") as fh:
            return pickle.load(fh)
    t0 = time.perf_counter()
    frames, truth, meta = render_scene(rec)
    if bits == 8:
        frames = np.clip(frames, 0, 255).astype(np.uint8)
    t_render = time.perf_counter() - t0
    t0 = time.perf_counter()
    idx = np.unique(np.linspace(0, len(frames) - 1, min(len(frames), 40)).astype(int))
    settings = detect.choose_detection_settings(frames[idx])
    spots = pd.concat(
        [
            detect.locate_spots(frames[a : a + 100], settings=settings, first_frame=a)
            for a in range(0, len(frames), 100)
        ],
        ignore_index=True,
    )
    out = {
        "truth": truth,
        "spots": spots,
        "settings": settings,
        "t_render_s": t_render,
        "t_detect_s": time.perf_counter() - t0,
        "n_frames": len(frames),
    }
    cache.mkdir(parents=True, exist_ok=True)
    with open(path, "wb") as fh:
        pickle.dump(out, fh)
    return out


def wrong_join_rate(tracks: pd.DataFrame, tx, ty, truth) -> float:
    trow = assign_to_truth(tracks, tx, ty, truth)
    tpart = np.where(trow >= 0, truth["particle"].to_numpy()[np.maximum(trow, 0)], -1)
    same = np.diff(tracks["track"].to_numpy()) == 0
    both = same & (trow[1:] >= 0) & (trow[:-1] >= 0)
    return float((both & (tpart[1:] != tpart[:-1])).sum() / max(both.sum(), 1))


def run_one(name: str, seed: int, n_frames: int, size: int, cache: Path) -> dict:
    desc, changes, bits = SCENES[name]
    rec = recipe(seed, n_frames, size, changes)
    data = rendered(rec, bits, cache)
    truth, spots = data["truth"], data["spots"]
    px, dt = rec.pixel_size_um, rec.frame_interval_s
    tx, ty = truth["x_um"].to_numpy() / px, truth["y_um"].to_numpy() / px

    # as msdkit run does: linked down to 2 points; the long tracks (>= 10 points) are analysed, the sample D
    # pools every track of >= 3 points (analysis.sample_min_track_points)
    t0 = time.perf_counter()
    all_tracks, lset = link.link_spots(spots, frame_interval_s=dt, frame_shape=(size, size),
                                       min_track_points=2)
    t_link = time.perf_counter() - t0
    counts = all_tracks.groupby("track")["frame"].transform("size")
    tracks = all_tracks[counts >= SAMPLE_MIN_POINTS].reset_index(drop=True)
    all_um = pd.DataFrame(
        {
            "track": all_tracks["track"],
            "frame": all_tracks["frame"],
            "x_um": all_tracks["x_px"] * px,
            "y_um": all_tracks["y_px"] * px,
        }
    )
    long_um = all_um[(counts >= LONG_MIN_POINTS).to_numpy()].reset_index(drop=True)
    res = pipeline.analyze_tracks(
        long_um, frame_interval_s=dt, exposure_s=rec.exposure_s, temperature_c=25.0, medium="water",
        sizing_tracks=all_um,
        sample_tracks=all_um[(counts >= SAMPLE_MIN_POINTS).to_numpy()].reset_index(drop=True),
    )
    s = res.summary

    row = assign_to_truth(spots, tx, ty, truth)
    infocus = truth["in_focus"].to_numpy()
    matched = row >= 0
    recall = float(infocus[row[matched]].sum() / max(infocus.sum(), 1))
    perfect = pd.DataFrame(
        {
            "track": truth["particle"].to_numpy()[row[matched]],
            "frame": spots["frame"][matched].to_numpy(),
            "x_px": spots["x_px"][matched].to_numpy(),
            "y_px": spots["y_px"][matched].to_numpy(),
        }
    )
    perfect = link._cut_at_field_edge(perfect, (size, size), lset.edge_margin_px)
    perfect = perfect[perfect.groupby("track")["frame"].transform("size") >= SAMPLE_MIN_POINTS]
    D_perfect = sample_D(perfect, px, dt, rec.exposure_s)
    D_linked = sample_D(tracks, px, dt, rec.exposure_s)
    D_truth = covariance_D(
        truth[["x_um", "y_um"]].to_numpy(), truth["frame"].to_numpy(), truth["particle"].to_numpy(), dt
    )
    scan = {}
    for k in SCAN_ACCEPTANCE_SD:
        tk = link.link_spots(spots, acceptance_sd=k, frame_shape=(size, size),
                             min_track_points=SAMPLE_MIN_POINTS)[0]
        scan[k] = sample_D(tk, px, dt, rec.exposure_s)
    return {
        "scene": name,
        "seed": seed,
        "D": s["D_um2_s"],
        "D_lo": s["D_ci95_um2_s"][0],
        "D_hi": s["D_ci95_um2_s"][1],
        "radius_nm": s["radius_nm"],
        "alpha": s["alpha"],
        "alpha_lo": s["alpha_ci95"][0],
        "alpha_hi": s["alpha_ci95"][1],
        "flags": ",".join(s["flags"]),
        "estimator": s["estimator"],
        "n_tracks": s["n_tracks"],
        "n_tracks_D": s["n_tracks_D"],
        "spots_per_frame": len(spots) / data["n_frames"],
        "recall_in_focus": recall,
        "wrong_join_rate": wrong_join_rate(tracks, tx, ty, truth),
        "D_truth_level": D_truth,
        "D_perfect_links": D_perfect,
        "linking_effect": D_linked / D_perfect - 1.0,
        "scan": scan,
        "step_sd_px": lset.step_sd_px,
        "continuation": lset.continuation_fraction,
        "acceptance_sd": lset.acceptance_sd,
        "t_detect_s": data["t_detect_s"],
        "t_link_s": t_link,
    }


def pct(v: float, ref: float) -> str:
    return f"{100 * (v / ref - 1):+.1f}"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=2)
    ap.add_argument("--first-seed", type=int, default=101)
    ap.add_argument("--frames", type=int, default=200)
    ap.add_argument("--size", type=int, default=256)
    ap.add_argument("--scenes", default=",".join(SCENES))
    ap.add_argument("--cache", default=os.path.join(tempfile.gettempdir(), "msdkit_bench_detection"))
    a = ap.parse_args()
    cache = Path(a.cache)
    rows = []
    for name in a.scenes.split(","):
        for k in range(a.seeds):
            r = run_one(name, a.first_seed + k, a.frames, a.size, cache)
            rows.append(r)
            print(
                f"{name} seed {r['seed']}: D {r['D']:.3f} ({pct(r['D'], D_TRUE)} %), "
                f"radius {r['radius_nm']:.1f} nm "
                f"({pct(r['radius_nm'], RADIUS_TRUE_NM)} %), {r['n_tracks']} tracks, wrong joins "
                f"{100 * r['wrong_join_rate']:.1f} %, step SD {r['step_sd_px']:.2f} px, continuation "
                f"{r['continuation']:.2f}, joining radius {r['acceptance_sd']:.2f} SD, "
                f"detect {r['t_detect_s']:.0f} s, link {r['t_link_s']:.1f} s",
                flush=True,
            )
    df = pd.DataFrame(rows)
    print(
        f"\nMovie → D with automatic settings: {a.seeds} movie(s) per scene of {a.size} x {a.size} px x "
        f"{a.frames} frames; errors in % of the truth (D {D_TRUE} µm²/s, radius {RADIUS_TRUE_NM:.0f} nm), "
        "mean over movies\n"
    )
    head = (
        "| scene | what changes | D | radius | alpha | truth-level | perfect links | linking | "
        "tracks (long / for D) | "
        "spots/frame | recall | wrong joins | D at radius 3.8 / 4.2 / 4.6 SD |"
    )
    print(head)
    print("|---" * (head.count("|") - 1) + "|")
    worst = 0.0
    for name in dict.fromkeys(df["scene"]):
        g = df[df["scene"] == name]
        D = g["D"].mean()
        worst = max(worst, abs(D / D_TRUE - 1))
        scan = " / ".join(pct(np.mean([s[k] for s in g["scan"]]), D_TRUE) for k in SCAN_ACCEPTANCE_SD)
        print(
            f"| {name} | {SCENES[name][0]} | {pct(D, D_TRUE)} | "
            f"{pct(g['radius_nm'].mean(), RADIUS_TRUE_NM)} | {g['alpha'].mean():.3f} | "
            f"{pct(g['D_truth_level'].mean(), D_TRUE)} | {pct(g['D_perfect_links'].mean(), D_TRUE)} | "
            f"{100 * g['linking_effect'].mean():+.1f} | "
            f"{g['n_tracks'].mean():.0f} / {g['n_tracks_D'].mean():.0f} | "
            f"{g['spots_per_frame'].mean():.0f} | "
            f"{g['recall_in_focus'].mean():.2f} | "
            f"{100 * g['wrong_join_rate'].mean():.1f} % | {scan} |"
        )
    print(
        f"\nlargest |D error| over scenes: {100 * worst:.1f} %; per-movie D errors: mean "
        f"{100 * (df['D'] / D_TRUE - 1).mean():+.1f} %, SD {100 * (df['D'] / D_TRUE - 1).std():.1f} %; "
        f"linking alone: mean {100 * df['linking_effect'].mean():+.1f} %, largest scene mean "
        f"{100 * df.groupby('scene')['linking_effect'].mean().abs().max():.1f} %; "
        "the 95 % interval of D holds the "
        f"truth in {int(((df['D_lo'] <= D_TRUE) & (D_TRUE <= df['D_hi'])).sum())} of {len(df)} movies"
    )
    print(
        f"sample alpha: mean {df['alpha'].mean():.3f}, per-movie SD {df['alpha'].std():.3f}, "
        "its 95 % interval "
        f"holds 1 in {int(((df['alpha_lo'] <= 1) & (1 <= df['alpha_hi'])).sum())} of {len(df)} movies; "
        f"movies with flags: "
        f"{', '.join(f'{r.scene}/{r.seed}: {r.flags}' for r in df.itertuples() if r.flags) or 'none'}"
    )


if __name__ == "__main__":
    main()
