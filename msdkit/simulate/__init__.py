"""Synthetic data with known truth: motion models, movie rendering and scene recipes."""

from .motion import (
    brownian_positions,
    confined_positions,
    directed_positions,
    fbm_positions,
    fgn_increments,
    positions_to_tracks,
)

__all__ = [
    "brownian_positions",
    "confined_positions",
    "directed_positions",
    "fbm_positions",
    "fgn_increments",
    "positions_to_tracks",
]
