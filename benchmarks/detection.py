"""Detection and linking with automatic settings on simulated movies of 100 nm beads in water at 25 °C.

Renders a few movies with the simulator (pixel 0.166 µm, 30 frames/s, 15 ms exposure, 50 particles in focus on
average, 3D motion through a slab so particles fade in and out of focus), runs detect + link with nothing set,
matches spots and tracks to the truth and prints:

* detection recall (true in-focus positions found) and precision (spots that are a real particle);
* localisation RMS error against the exposure-averaged true positions (the blurred spot's centre);
* linking error rate: steps of a track joining two different true particles (or a non-particle);
* D from the covariance-based estimator (Vestergaard, Blainey & Flyvbjerg 2014, Phys. Rev. E 89:022726):
  per axis D = <dx_k^2>/(2 dt) + <dx_k dx_k+1>/dt over all consecutive steps of all tracks, averaged over x
  and y, against the Stokes–Einstein truth; also the same estimator on the true positions of the same track
  points (what perfect detection and linking would give) and a bootstrap 95 % interval over tracks.

Run: python benchmarks/detection.py [--movies 3] [--frames 200] [--size 256] [--seed 1]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from msdkit import detect, link
from msdkit.simulate.recipe import recipe_from_dict
from msdkit.simulate.scene import render_scene


def recipe(seed: int, n_frames: int, size: int, count: float):
    return recipe_from_dict({
        "name": f"bench_beads_{seed}",
        "seed": seed,
        "width_px": size,
        "height_px": size,
        "pixel_size_um": 0.166,
        "n_frames": n_frames,
        "frame_interval_s": 1.0 / 30.0,
        "exposure_s": 0.015,
        "temperature_c": 25.0,
        "medium": "water",
        "optics": {"n_dims": 3, "wavelength_nm": 520, "numerical_aperture": 0.8, "focal_depth_um": 1.0,
                   "slab_um": 4.0},
        "camera": {"background_photons": 20, "read_noise_electrons": 1.5, "gain_adu_per_electron": 1.0,
                   "offset_adu": 100},
        "populations": [{"label": "beads_100nm", "count_in_view": count, "diameter_nm": 100, "photons": 3000,
                         "motion": "brownian"}],
    })


def covariance_D(x: np.ndarray, frames: np.ndarray, track: np.ndarray, dt: float) -> tuple[float, np.ndarray]:
    """Pooled covariance-based D over all consecutive steps (and consecutive step pairs) of all tracks.

    Returns the pooled D and per-track sums (for a bootstrap over tracks).
    """
    order = np.lexsort((frames, track))
    x, frames, track = x[order], frames[order], track[order]
    step = np.diff(x, axis=0)
    ok = (np.diff(frames) == 1) & (np.diff(track) == 0)
    pair = ok[:-1] & ok[1:]
    sq = (step**2).sum(axis=1)  # both axes
    prod = (step[:-1] * step[1:]).sum(axis=1)
    n_dims = x.shape[1]
    t_step = track[:-1]
    t_pair = track[:-2]
    per = pd.DataFrame({"sq": np.bincount(t_step[ok], sq[ok]), "n_sq": np.bincount(t_step[ok]) * n_dims})
    pp = pd.DataFrame({"pr": np.bincount(t_pair[pair], prod[pair]), "n_pr": np.bincount(t_pair[pair]) * n_dims})
    per = per.join(pp, how="outer").fillna(0.0)
    D = per["sq"].sum() / per["n_sq"].sum() / (2 * dt) + per["pr"].sum() / per["n_pr"].sum() / dt
    return float(D), per.to_numpy()


def bootstrap_ci(per: np.ndarray, dt: float, rng, n_boot: int = 400) -> tuple[float, float]:
    n = per.shape[0]
    vals = []
    for _ in range(n_boot):
        s = per[rng.integers(0, n, n)].sum(axis=0)
        vals.append(s[0] / s[1] / (2 * dt) + s[2] / s[3] / dt)
    return float(np.percentile(vals, 2.5)), float(np.percentile(vals, 97.5))


def run_one(seed: int, n_frames: int, size: int, count: float, rng) -> dict:
    rec = recipe(seed, n_frames, size, count)
    t0 = time.perf_counter()
    frames, truth, meta = render_scene(rec)
    t_render = time.perf_counter() - t0
    px, dt = rec.pixel_size_um, rec.frame_interval_s
    D_true = float(meta["populations"][0]["D_um2_s"]) if "D_um2_s" in meta["populations"][0] else float(
        truth["D_um2_s"].median())

    t0 = time.perf_counter()
    idx = np.unique(np.linspace(0, len(frames) - 1, min(len(frames), 40)).astype(int))
    settings = detect.choose_detection_settings(frames[idx])
    spots = pd.concat([detect.locate_spots(frames[a:a + 100], settings=settings, first_frame=a)
                       for a in range(0, len(frames), 100)], ignore_index=True)
    t_detect = time.perf_counter() - t0
    t0 = time.perf_counter()
    tracks, lset = link.link_spots(spots, frame_interval_s=dt)
    t_link = time.perf_counter() - t0

    # match spots to the truth of the same frame (nearest true particle within 2 px)
    tx = truth["x_um"].to_numpy() / px
    ty = truth["y_um"].to_numpy() / px
    tf = truth["frame"].to_numpy()
    match_particle = np.full(len(spots), -1)
    match_err = np.full((len(spots), 2), np.nan)
    match_row = np.full(len(spots), -1)
    found_infocus = 0
    n_infocus = int(truth["in_focus"].sum())
    for f, rows in truth.groupby("frame").indices.items():
        sidx = np.nonzero(spots["frame"].to_numpy() == f)[0]
        if sidx.size == 0:
            continue
        tree = cKDTree(np.column_stack([tx[rows], ty[rows]]))
        d, j = tree.query(spots[["x_px", "y_px"]].to_numpy()[sidx])
        ok = d < 2.0
        match_particle[sidx[ok]] = truth["particle"].to_numpy()[rows[j[ok]]]
        match_row[sidx[ok]] = rows[j[ok]]
        match_err[sidx[ok]] = spots[["x_px", "y_px"]].to_numpy()[sidx[ok]] - np.column_stack(
            [tx[rows[j[ok]]], ty[rows[j[ok]]]])
        found_infocus += len(set(rows[j[ok]]) & set(rows[truth["in_focus"].to_numpy()[rows]]))
    matched = match_particle >= 0
    infocus_match = matched.copy()
    infocus_match[matched] = truth["in_focus"].to_numpy()[match_row[matched]]
    err_in = match_err[infocus_match]
    err_all = match_err[matched]

    # linking errors: consecutive points of a track that are different (or no) true particles
    key = spots.set_index(["frame", "x_px"]).index
    spot_particle = pd.Series(match_particle, index=key)
    spot_row = pd.Series(match_row, index=key)
    tp = spot_particle.reindex(pd.MultiIndex.from_arrays([tracks["frame"], tracks["x_px"]])).to_numpy()
    trow = spot_row.reindex(pd.MultiIndex.from_arrays([tracks["frame"], tracks["x_px"]])).to_numpy()
    same_track = np.diff(tracks["track"].to_numpy()) == 0
    wrong = same_track & ((tp[1:] != tp[:-1]) | (tp[1:] < 0))
    n_steps = int(same_track.sum())

    xy_um = tracks[["x_px", "y_px"]].to_numpy() * px
    fr = tracks["frame"].to_numpy()
    tr = tracks["track"].to_numpy()
    D_est, per = covariance_D(xy_um, fr, tr, dt)
    lo, hi = bootstrap_ci(per, dt, rng)
    # same estimator on the true positions of the same track points (all points matched)
    okrow = trow >= 0
    true_xy = np.column_stack([tx[trow[okrow]], ty[trow[okrow]]]) * px
    D_truepos, _ = covariance_D(true_xy, fr[okrow], tr[okrow], dt)
    return {
        "seed": seed,
        "frames": len(frames),
        "size": size,
        "spot_sigma_px": settings.spot_sigma_px,
        "min_snr": settings.min_snr,
        "spots_per_frame": len(spots) / len(frames),
        "recall_in_focus": found_infocus / max(n_infocus, 1),
        "precision": float(matched.mean()) if len(spots) else float("nan"),
        "loc_rms_in_focus_nm": float(np.sqrt(np.nanmean(err_in**2)) * px * 1e3),
        "loc_rms_all_nm": float(np.sqrt(np.nanmean(err_all**2)) * px * 1e3),
        "median_precision_nm": float(spots["precision_px"].median() * px * 1e3),
        "max_step_px": lset.max_step_px,
        "step_sd_px": lset.step_sd_px,
        "limited_by_spacing": lset.limited_by_spacing,
        "n_tracks": lset.n_tracks,
        "fraction_linked": lset.fraction_linked,
        "link_error_rate": float(wrong.sum() / max(n_steps, 1)),
        "D_true": D_true,
        "D_est": D_est,
        "D_ci95": (lo, hi),
        "D_true_positions": D_truepos,
        "t_render_s": t_render,
        "t_detect_s": t_detect,
        "t_link_s": t_link,
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--movies", type=int, default=3)
    ap.add_argument("--frames", type=int, default=200)
    ap.add_argument("--size", type=int, default=256)
    ap.add_argument("--count", type=float, default=50.0, help="particles in focus per frame on average")
    ap.add_argument("--seed", type=int, default=1)
    a = ap.parse_args()
    rng = np.random.default_rng(a.seed)
    rows = []
    for k in range(a.movies):
        r = run_one(a.seed + k, a.frames, a.size, a.count, rng)
        rows.append(r)
        print(f"movie seed {r['seed']}: {r['frames']} frames {r['size']}x{r['size']} px, "
              f"spot SD {r['spot_sigma_px']:.2f} px, threshold {r['min_snr']:.1f} SD, "
              f"{r['spots_per_frame']:.1f} spots/frame")
        print(f"  detection: recall (in focus) {r['recall_in_focus']:.3f}, precision {r['precision']:.3f}; "
              f"localisation RMS error {r['loc_rms_in_focus_nm']:.1f} nm in focus, {r['loc_rms_all_nm']:.1f} nm "
              f"all (median precision estimate {r['median_precision_nm']:.1f} nm)")
        print(f"  linking: max step {r['max_step_px']:.1f} px (step SD {r['step_sd_px']:.2f} px"
              f"{', limited by spacing' if r['limited_by_spacing'] else ''}), {r['n_tracks']} tracks, "
              f"{100 * r['fraction_linked']:.1f} % of spots linked, wrong-join rate "
              f"{100 * r['link_error_rate']:.3f} %")
        print(f"  D: {r['D_est']:.3f} um2/s (95 % CI {r['D_ci95'][0]:.3f}-{r['D_ci95'][1]:.3f}) vs truth "
              f"{r['D_true']:.3f} -> {100 * (r['D_est'] / r['D_true'] - 1):+.2f} %; same points at true positions "
              f"{r['D_true_positions']:.3f} ({100 * (r['D_true_positions'] / r['D_true'] - 1):+.2f} %)")
        print(f"  time: render {r['t_render_s']:.1f} s, detect {r['t_detect_s']:.1f} s "
              f"({1e3 * r['t_detect_s'] / r['frames']:.1f} ms/frame), link {r['t_link_s']:.1f} s")
    d = np.array([r["D_est"] / r["D_true"] - 1 for r in rows])
    print(f"\nover {len(rows)} movies: D error mean {100 * d.mean():+.2f} %, max |error| "
          f"{100 * np.abs(d).max():.2f} %; wrong-join rate mean "
          f"{100 * np.mean([r['link_error_rate'] for r in rows]):.3f} %; recall "
          f"{np.mean([r['recall_in_focus'] for r in rows]):.3f}, precision "
          f"{np.mean([r['precision'] for r in rows]):.3f}")


if __name__ == "__main__":
    main()
