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
from scipy.optimize import linear_sum_assignment
from scipy.spatial import cKDTree

from msdkit import detect, link
from msdkit.simulate.recipe import recipe_from_dict
from msdkit.simulate.scene import render_scene


def recipe(seed: int, n_frames: int, size: int, count: float):
    return recipe_from_dict(
        {
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
            "optics": {
                "n_dims": 3,
                "wavelength_nm": 520,
                "numerical_aperture": 0.8,
                "focal_depth_um": 1.0,
                "slab_um": 4.0,
            },
            "camera": {
                "background_photons": 20,
                "read_noise_electrons": 1.5,
                "gain_adu_per_electron": 1.0,
                "offset_adu": 100,
            },
            "populations": [
                {
                    "label": "beads_100nm",
                    "count_in_view": count,
                    "diameter_nm": 100,
                    "photons": 3000,
                    "motion": "brownian",
                }
            ],
        }
    )


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
    pp = pd.DataFrame(
        {"pr": np.bincount(t_pair[pair], prod[pair]), "n_pr": np.bincount(t_pair[pair]) * n_dims}
    )
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


def assign_to_truth(table: pd.DataFrame, tx: np.ndarray, ty: np.ndarray, truth: pd.DataFrame) -> np.ndarray:
    """Row of the truth each spot is (one-to-one per frame, within 2 px), -1 when none."""
    out = np.full(len(table), -1)
    fr = table["frame"].to_numpy()
    xy = table[["x_px", "y_px"]].to_numpy()
    for f, rows in truth.groupby("frame").indices.items():
        si = np.nonzero(fr == f)[0]
        if si.size == 0:
            continue
        tree = cKDTree(np.column_stack([tx[rows], ty[rows]]))
        pairs = tree.sparse_distance_matrix(cKDTree(xy[si]), 2.0, output_type="coo_matrix")
        if pairs.nnz == 0:
            continue
        cost = np.full((len(rows), len(si)), 1e6)
        cost[pairs.row, pairs.col] = pairs.data**2
        a, b = linear_sum_assignment(cost)
        ok = cost[a, b] < 1e6
        out[si[b[ok]]] = rows[a[ok]]
    return out


def run_one(seed: int, n_frames: int, size: int, count: float, rng) -> dict:
    rec = recipe(seed, n_frames, size, count)
    t0 = time.perf_counter()
    frames, truth, meta = render_scene(rec)
    t_render = time.perf_counter() - t0
    px, dt = rec.pixel_size_um, rec.frame_interval_s
    D_true = (
        float(meta["populations"][0]["D_um2_s"])
        if "D_um2_s" in meta["populations"][0]
        else float(truth["D_um2_s"].median())
    )

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
    t_detect = time.perf_counter() - t0
    t0 = time.perf_counter()
    tracks, lset = link.link_spots(spots, frame_interval_s=dt)
    t_link = time.perf_counter() - t0

    # match spots one-to-one to true particles of the same frame (assignment, within 2 px)
    tx = truth["x_um"].to_numpy() / px
    ty = truth["y_um"].to_numpy() / px
    spot_row = assign_to_truth(spots, tx, ty, truth)
    matched = spot_row >= 0
    infocus = truth["in_focus"].to_numpy()
    n_infocus = int(infocus.sum())
    found_infocus = int(infocus[spot_row[matched]].sum())
    err = spots[["x_px", "y_px"]].to_numpy()[matched] - np.column_stack(
        [tx[spot_row[matched]], ty[spot_row[matched]]]
    )
    err_in = err[infocus[spot_row[matched]]]
    # a true particle is "crowded" in a frame when another true particle is within 3 px: one spot may then
    # show both, and which of the two it is cannot be told
    crowded = np.zeros(len(truth), dtype=bool)
    for _, rows in truth.groupby("frame").indices.items():
        if len(rows) > 1:
            d, _ = cKDTree(np.column_stack([tx[rows], ty[rows]])).query(
                np.column_stack([tx[rows], ty[rows]]), k=2
            )
            crowded[rows] = d[:, 1] < 3.0

    # linking errors: consecutive points of a track that are different true particles, counted over links
    # whose both ends are matched and uncrowded
    trow = assign_to_truth(tracks, tx, ty, truth)
    tpart = np.where(trow >= 0, truth["particle"].to_numpy()[np.maximum(trow, 0)], -1)
    same_track = np.diff(tracks["track"].to_numpy()) == 0
    clear = same_track & (trow[1:] >= 0) & (trow[:-1] >= 0)
    clear[clear] &= ~crowded[trow[1:][clear]] & ~crowded[trow[:-1][clear]]
    wrong = clear & (tpart[1:] != tpart[:-1])
    n_clear = int(clear.sum())

    xy_um = tracks[["x_px", "y_px"]].to_numpy() * px
    fr = tracks["frame"].to_numpy()
    tr = tracks["track"].to_numpy()
    D_est, per = covariance_D(xy_um, fr, tr, dt)
    lo, hi = bootstrap_ci(per, dt, rng)
    # same estimator on the true positions of the same track points (all points matched)
    okrow = trow >= 0
    true_xy = np.column_stack([tx[trow[okrow]], ty[trow[okrow]]]) * px
    D_truepos, _ = covariance_D(true_xy, fr[okrow], tr[okrow], dt)
    # the simulation's own scatter: every true position of every particle
    D_all_truth, _ = covariance_D(
        truth[["x_um", "y_um"]].to_numpy(), truth["frame"].to_numpy(), truth["particle"].to_numpy(), dt
    )
    # perfect linking of the detected spots: spots joined by their true particle, same length filter
    o = pd.DataFrame(
        {
            "track": truth["particle"].to_numpy()[spot_row[matched]],
            "frame": spots["frame"].to_numpy()[matched],
            "x": spots["x_px"].to_numpy()[matched] * px,
            "y": spots["y_px"].to_numpy()[matched] * px,
        }
    )
    o = o[o.groupby("track")["frame"].transform("size") >= lset.min_track_points]
    D_oracle, _ = covariance_D(o[["x", "y"]].to_numpy(), o["frame"].to_numpy(), o["track"].to_numpy(), dt)
    return {
        "seed": seed,
        "frames": len(frames),
        "size": size,
        "spot_sigma_px": settings.spot_sigma_px,
        "min_snr": settings.min_snr,
        "spots_per_frame": len(spots) / len(frames),
        "recall_in_focus": found_infocus / max(n_infocus, 1),
        "precision": float(matched.mean()) if len(spots) else float("nan"),
        "loc_rms_in_focus_nm": float(np.sqrt(np.mean(err_in**2)) * px * 1e3),
        "loc_rms_all_nm": float(np.sqrt(np.mean(err**2)) * px * 1e3),
        "median_precision_nm": float(spots["precision_px"].median() * px * 1e3),
        "max_step_px": lset.max_step_px,
        "step_sd_px": lset.step_sd_px,
        "limited_by_spacing": lset.limited_by_spacing,
        "n_tracks": lset.n_tracks,
        "fraction_linked": lset.fraction_linked,
        "link_error_rate": float(wrong.sum() / max(n_clear, 1)),
        "n_links_checked": n_clear,
        "D_all_truth": D_all_truth,
        "D_oracle": D_oracle,
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
        print(
            f"movie seed {r['seed']}: {r['frames']} frames {r['size']}x{r['size']} px, "
            f"spot SD {r['spot_sigma_px']:.2f} px, threshold {r['min_snr']:.1f} SD, "
            f"{r['spots_per_frame']:.1f} spots/frame"
        )
        print(
            f"  detection: recall (in focus) {r['recall_in_focus']:.3f}, precision {r['precision']:.3f}; "
            f"localisation RMS error {r['loc_rms_in_focus_nm']:.1f} nm in focus, "
            f"{r['loc_rms_all_nm']:.1f} nm all (median precision estimate {r['median_precision_nm']:.1f} nm)"
        )
        print(
            f"  linking: max step {r['max_step_px']:.1f} px (step SD {r['step_sd_px']:.2f} px"
            f"{', limited by spacing' if r['limited_by_spacing'] else ''}), {r['n_tracks']} tracks, "
            f"{100 * r['fraction_linked']:.1f} % of spots linked, wrong-join rate "
            f"{100 * r['link_error_rate']:.2f} % "
            f"(of {r['n_links_checked']} links between uncrowded particles)"
        )
        print(
            f"  D: {r['D_est']:.3f} um2/s (95 % CI {r['D_ci95'][0]:.3f}-{r['D_ci95'][1]:.3f}) vs truth "
            f"{r['D_true']:.3f} -> {100 * (r['D_est'] / r['D_true'] - 1):+.2f} %; "
            f"same points at true positions "
            f"{r['D_true_positions']:.3f} ({100 * (r['D_true_positions'] / r['D_true'] - 1):+.2f} %)"
        )
        print(
            f"     references: every true position of the simulation {r['D_all_truth']:.3f} "
            f"({100 * (r['D_all_truth'] / r['D_true'] - 1):+.2f} %), detected spots linked perfectly "
            f"{r['D_oracle']:.3f} ({100 * (r['D_oracle'] / r['D_true'] - 1):+.2f} %)"
        )
        print(
            f"  time: render {r['t_render_s']:.1f} s, detect {r['t_detect_s']:.1f} s "
            f"({1e3 * r['t_detect_s'] / r['frames']:.1f} ms/frame), link {r['t_link_s']:.1f} s"
        )
    d = np.array([r["D_est"] / r["D_true"] - 1 for r in rows])
    print(
        f"\nover {len(rows)} movies: D error mean {100 * d.mean():+.2f} %, max |error| "
        f"{100 * np.abs(d).max():.2f} %; wrong-join rate mean "
        f"{100 * np.mean([r['link_error_rate'] for r in rows]):.3f} %; recall "
        f"{np.mean([r['recall_in_focus'] for r in rows]):.3f}, precision "
        f"{np.mean([r['precision'] for r in rows]):.3f}"
    )


if __name__ == "__main__":
    main()
