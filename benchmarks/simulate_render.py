"""Render speed of the movie simulator, against a dense baseline measured in the same run.

Renders a 256 x 256 movie of ~50 in-focus 100 nm beads (3D, 15 ms exposure with motion blur, slab 4 µm
around a 1 µm focal depth: ~300 particles simulated in the slab) and prints frames per second of

* the whole scene (motion + windowed rendering + camera noise), as ``render_scene`` does it;
* the same expected images drawn densely (every emitter evaluated over every pixel), on a few frames;
* the camera noise alone (Poisson + read noise on a 256 x 256 frame), the part no renderer can avoid.

Run: python benchmarks/simulate_render.py [--frames 300] [--size 256] [--count 50]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy.special import ndtr

from msdkit.simulate.optics import camera_counts
from msdkit.simulate.recipe import recipe_from_dict
from msdkit.simulate.scene import _SceneMotion, render_scene


def recipe(n_frames: int, size: int, count: float):
    return recipe_from_dict(
        {
            "name": "bench_render",
            "seed": 1,
            "width_px": size,
            "height_px": size,
            "pixel_size_um": 0.166,
            "n_frames": n_frames,
            "frame_interval_s": 1 / 30,
            "exposure_s": 0.015,
            "temperature_c": 25.0,
            "optics": {
                "n_dims": 3,
                "wavelength_nm": 520,
                "numerical_aperture": 0.8,
                "focal_depth_um": 1.0,
                "slab_um": 4.0,
            },
            "camera": {"background_photons": 20, "read_noise_electrons": 1.5},
            "populations": [{"count_in_view": count, "diameter_nm": 100, "photons": 3000}],
        }
    )


def dense_frame(sub: np.ndarray, photons: np.ndarray, shape, sigma_px: float, ps: float, focal: float):
    """Every emitter over every pixel (no windows): the straightforward way to draw the same image."""
    ny, nx = shape
    x = sub[..., 0].ravel() / ps
    y = sub[..., 1].ravel() / ps
    w = 1 + (2 * sub[..., 2].ravel() / focal) ** 2
    n = np.repeat(photons / sub.shape[1], sub.shape[1]) / w
    s = sigma_px * np.sqrt(w)
    ex = np.diff(ndtr((np.arange(nx + 1)[None, :] - 0.5 - x[:, None]) / s[:, None]), axis=1)
    ey = np.diff(ndtr((np.arange(ny + 1)[None, :] - 0.5 - y[:, None]) / s[:, None]), axis=1)
    return np.einsum("e,ey,ex->yx", n, ey, ex, optimize=True)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--frames", type=int, default=300)
    ap.add_argument("--size", type=int, default=256)
    ap.add_argument("--count", type=float, default=50)
    args = ap.parse_args()
    rec = recipe(args.frames, args.size, args.count)

    t0 = time.perf_counter()
    frames, truth, meta = render_scene(rec)
    t_scene = time.perf_counter() - t0
    fps_scene = args.frames / t_scene

    motion = _SceneMotion(rec, np.random.default_rng(0))
    n_dense = 5
    t_dense = 0.0
    for _ in range(n_dense):
        ids_photons = motion.photons.copy()
        sub = motion.step()
        t0 = time.perf_counter()
        dense_frame(sub, ids_photons, (args.size, args.size), rec.optics.sigma_um() / 0.166, 0.166, 1.0)
        t_dense += time.perf_counter() - t0
    fps_dense = n_dense / t_dense

    g = np.random.default_rng(0)
    lam = np.full((args.size, args.size), 20.0)
    t0 = time.perf_counter()
    for _ in range(50):
        camera_counts(lam, read_noise_electrons=1.5, rng=g)
    fps_noise = 50 / (time.perf_counter() - t0)

    print(
        f"scene: {args.frames} frames {args.size}x{args.size}, "
        f"{meta['mean_particles_in_focus_per_frame']:.1f} "
        f"particles in focus per frame, {motion.pop.size} simulated, {meta['blur_substeps']} blur sub-steps"
    )
    print(f"whole scene (motion + render + noise): {t_scene:6.2f} s  = {fps_scene:7.1f} frames/s")
    print(f"dense drawing of the same emitters:                {fps_dense:7.1f} frames/s")
    print(f"camera noise alone:                                {fps_noise:7.1f} frames/s")
    print(
        "speed-up of windowed over dense drawing (whole scene vs dense image only): "
        f"{fps_scene / fps_dense:.1f} x"
    )
    print(f"share of the time spent on camera noise: {fps_scene / fps_noise:.0%}")


if __name__ == "__main__":
    main()
