"""Synthetic data with known truth: motion models, movie rendering and scene recipes."""

from .motion import (
    brownian_positions,
    confined_positions,
    directed_positions,
    fbm_positions,
    fgn_increments,
    positions_to_tracks,
)
from .optics import (
    camera_counts,
    defocus_area_factor,
    expected_photon_image,
    psf_sigma_um,
    render_movie,
)
from .recipe import SceneRecipe, load_recipe, recipe_from_dict
from .scene import TRUTH_COLUMNS, render_scene, scene_truth, simulate_from_recipe, write_scene

__all__ = [
    "TRUTH_COLUMNS",
    "SceneRecipe",
    "brownian_positions",
    "camera_counts",
    "confined_positions",
    "defocus_area_factor",
    "directed_positions",
    "expected_photon_image",
    "fbm_positions",
    "fgn_increments",
    "load_recipe",
    "positions_to_tracks",
    "psf_sigma_um",
    "recipe_from_dict",
    "render_movie",
    "render_scene",
    "scene_truth",
    "simulate_from_recipe",
    "write_scene",
]
