"""Linking: known tracks recovered, gaps bridged without invented positions, step size from the data."""

import math

import numpy as np
import pandas as pd
import pytest

from msdkit import link
from msdkit.errors import InputError
from msdkit.simulate import brownian_positions

SEEDS = [0, 1, 2]


def true_spots(rng, *, n_side=6, spacing=80.0, n_frames=120, D_px2=1.0, drift=(0.0, 0.0), noise_px=0.1):
    """Particles starting on a grid (isolated), Brownian motion in pixels (frame interval 1, no blur)."""
    n = n_side * n_side
    pos = brownian_positions(
        n,
        n_frames,
        D_um2_s=D_px2,
        frame_interval_s=1.0,
        localization_sd_um=noise_px,
        drift_um_s=np.asarray(drift),
        rng=rng,
    )
    g = (np.arange(n_side) + 0.5) * spacing
    start = np.stack(np.meshgrid(g, g), axis=-1).reshape(n, 1, 2)
    pos = pos + start
    truth = np.repeat(np.arange(n), n_frames)
    frames = np.tile(np.arange(n_frames), n)
    return pd.DataFrame(
        {"frame": frames, "x_px": pos[..., 0].ravel(), "y_px": pos[..., 1].ravel(), "truth": truth}
    )


def wrong_joins(tracks):
    """Consecutive positions of a track that belong to different true particles."""
    return int((tracks.groupby("track")["truth"].diff().fillna(0) != 0).sum())


@pytest.mark.parametrize("seed", SEEDS)
def test_linking_recovers_known_tracks_with_gaps(seed):
    rng = np.random.default_rng(seed)
    # particles 120 px apart wander ~15 px per axis in 120 frames: they never meet, so every join is decidable
    spots = true_spots(rng, spacing=120.0)
    # remove single frames (a third of the frames 1, 6, 11, ...) and, for 10 particles, a run of two frames
    # (5k + 3, 5k + 4): runs of missing frames never exceed two
    f = spots["frame"]
    drop = (f % 5 == 1) & (rng.random(len(spots)) < 0.33)
    for p in rng.choice(spots["truth"].unique(), 10, replace=False):
        k = int(rng.integers(1, 20))
        drop |= (spots["truth"] == p) & f.isin([5 * k + 3, 5 * k + 4])
    kept = spots[~drop].sample(frac=1.0, random_state=seed).reset_index(drop=True)  # order must not matter
    tracks, settings = link.link_spots(kept, max_gap_frames=2, min_track_points=10)
    assert wrong_joins(tracks) == 0
    # one track per particle, holding all its detections: nothing lost, nothing invented (no interpolation)
    assert tracks.groupby("truth")["track"].nunique().eq(1).all()
    assert tracks["truth"].nunique() == spots["truth"].nunique()
    assert len(tracks) == len(kept)
    assert sorted(tracks["track"].unique()) == list(range(settings.n_tracks))
    assert settings.fraction_linked == 1.0
    gaps = tracks.groupby("track")["frame"].diff()
    assert gaps.max() <= 3
    assert settings.n_gaps_closed == int((gaps > 1).sum())


def test_gaps_longer_than_max_gap_split_the_track():
    rng = np.random.default_rng(4)
    spots = true_spots(rng, n_side=2, n_frames=60)
    hole = (spots["truth"] == 0) & spots["frame"].between(30, 32)  # three missing frames
    tracks, _ = link.link_spots(spots[~hole], max_gap_frames=2, min_track_points=5)
    assert tracks.loc[tracks["truth"] == 0, "track"].nunique() == 2
    tracks3, _ = link.link_spots(spots[~hole], max_gap_frames=3, min_track_points=5)
    assert tracks3.loc[tracks3["truth"] == 0, "track"].nunique() == 1


@pytest.mark.parametrize("seed", SEEDS)
def test_auto_step_size_recovers_the_step_sd(seed):
    # per-axis step SD sqrt(2 D + 2 noise^2) (common practice); ~8000 nearest-neighbour distances give the
    # maximum-likelihood SD to ~1 %; 5 % is a wide margin
    rng = np.random.default_rng(seed)
    D, noise = 2.0, 0.3
    spots = true_spots(rng, n_side=8, spacing=50.0, D_px2=D, noise_px=noise)
    tracks, settings = link.link_spots(spots.drop(columns="truth"))
    expected = math.sqrt(2 * D + 2 * noise**2)
    assert settings.chosen_automatically
    assert settings.step_sd_px == pytest.approx(expected, rel=0.05)
    assert settings.max_step_px == pytest.approx(5 * settings.step_sd_px)
    assert not settings.limited_by_spacing


def test_largest_step_is_capped_at_the_spot_spacing():
    rng = np.random.default_rng(8)
    spots = true_spots(rng, n_side=10, spacing=12.0, n_frames=30, D_px2=4.0)  # 5 step SDs = 14 px
    _, settings = link.link_spots(spots)
    assert settings.limited_by_spacing
    assert settings.max_step_px == pytest.approx(settings.spot_spacing_px)
    assert settings.spot_spacing_px < 12.5


def test_constant_drift_larger_than_the_steps_is_followed():
    rng = np.random.default_rng(6)
    drift = (5.0, -3.0)
    spots = true_spots(rng, n_side=5, spacing=60.0, n_frames=40, D_px2=0.5, drift=drift)
    tracks, settings = link.link_spots(spots, min_track_points=5)
    assert settings.drift_px_per_frame == pytest.approx(drift, abs=0.1)
    assert wrong_joins(tracks) == 0
    assert tracks.groupby("truth")["track"].nunique().eq(1).all()
    # positions are returned as measured, not drift-corrected
    pd.testing.assert_series_equal(
        tracks.sort_values(["truth", "frame"])["x_px"].reset_index(drop=True),
        spots.sort_values(["truth", "frame"])["x_px"].reset_index(drop=True),
    )


def test_short_tracks_are_dropped_and_ids_are_contiguous():
    rng = np.random.default_rng(3)
    spots = true_spots(rng, n_side=3, n_frames=30)
    short = spots["truth"].isin([1, 4]) & (spots["frame"] >= 8)  # particles 1 and 4 keep 8 points
    tracks, settings = link.link_spots(spots[~short], min_track_points=10, frame_interval_s=0.05)
    assert set(tracks["truth"]) == set(range(9)) - {1, 4}
    assert list(np.unique(tracks["track"])) == list(range(7))
    assert settings.n_tracks == 7
    assert settings.fraction_linked == pytest.approx(len(tracks) / len(spots[~short]))
    assert np.allclose(tracks["time_s"], tracks["frame"] * 0.05)
    assert list(tracks.columns[:4]) == ["track", "frame", "x_px", "y_px"]
    assert (tracks.groupby("track")["frame"].diff().dropna() > 0).all()


def test_given_max_step_is_used():
    rng = np.random.default_rng(1)
    spots = true_spots(rng, n_side=3, n_frames=20)
    tracks, settings = link.link_spots(spots, max_step_px=0.5, min_track_points=2)
    assert settings.max_step_px == 0.5 and not settings.chosen_automatically
    # steps have per-axis SD 1.4 px: a 0.5 px limit breaks nearly every track
    assert settings.fraction_linked < 0.5


def test_empty_spots_give_empty_tracks():
    empty = pd.DataFrame(
        {
            "frame": pd.Series(dtype="int64"),
            "x_px": pd.Series(dtype=float),
            "y_px": pd.Series(dtype=float),
            "mass": pd.Series(dtype=float),
        }
    )
    tracks, settings = link.link_spots(empty)
    assert len(tracks) == 0 and settings.n_tracks == 0
    assert list(tracks.columns[:4]) == ["track", "frame", "x_px", "y_px"]


def test_bad_spot_tables_are_rejected_with_a_clear_message():
    with pytest.raises(InputError, match="spots must be columns frame, x_px, y_px; got no column"):
        link.link_spots(pd.DataFrame({"frame": [0], "x": [1.0], "y": [2.0]}))
    with pytest.raises(InputError, match="max_gap_frames must be an integer >= 0; got -1"):
        link.link_spots(pd.DataFrame({"frame": [0], "x_px": [1.0], "y_px": [2.0]}), max_gap_frames=-1)
    with pytest.raises(InputError, match="finite numbers; got NaN"):
        link.link_spots(pd.DataFrame({"frame": [0], "x_px": [np.nan], "y_px": [2.0]}))
