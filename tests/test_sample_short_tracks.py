"""The sample D of a movie pools every track of >= 3 points (analysis.sample_min_track_points).

Check values: the covariance-based estimator written out from its published formula (Vestergaard, Blainey &
Flyvbjerg 2014, Phys. Rev. E 89:022726, eq. 14 with R = 0 for instantaneous exposure:
D = <dx^2> / (2 dt) + <dx_n dx_n+1> / dt, pooled over all steps and step pairs of all tracks).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from pydantic import ValidationError

from msdkit.config import Config
from msdkit.pipeline import analyze_tracks
from msdkit.simulate import brownian_positions, confined_positions, fbm_positions, positions_to_tracks

DT = 0.05


def _tracks(seed: int) -> pd.DataFrame:
    """300 short tracks (3-9 points) of a fast kind and 30 long (60 points) of a slow kind."""
    g = np.random.default_rng(seed)
    fast = brownian_positions(300, 9, D_um2_s=2.0, frame_interval_s=DT, localization_sd_um=0.02, rng=g)
    slow = brownian_positions(30, 60, D_um2_s=0.5, frame_interval_s=DT, localization_sd_um=0.02, rng=g)
    short = positions_to_tracks(fast, frame_interval_s=DT, lengths=g.integers(3, 10, 300))
    long = positions_to_tracks(slow, frame_interval_s=DT, first_track_id=1000)
    return pd.concat([short, long], ignore_index=True)


def _pooled_covariance_D(tracks: pd.DataFrame) -> float:
    sq = cross = n_sq = n_cross = 0.0
    for _, t in tracks.groupby("track"):
        xy = t.sort_values("frame")[["x_um", "y_um"]].to_numpy()
        d = np.diff(xy, axis=0)
        sq += float((d**2).sum())
        n_sq += d.size
        cross += float((d[:-1] * d[1:]).sum())
        n_cross += d[:-1].size
    return sq / n_sq / (2 * DT) + cross / n_cross / DT


@pytest.mark.parametrize("seed", [0])
def test_movie_sample_D_pools_every_track_of_three_or_more_points(seed):
    all_tracks = _tracks(seed)
    counts = all_tracks.groupby("track")["frame"].transform("size")
    long = all_tracks[counts >= 10].reset_index(drop=True)
    res = analyze_tracks(long, frame_interval_s=DT, exposure_s=0.0, drift_correction=False,
                         estimator="covariance", sizing_tracks=all_tracks,
                         sample_tracks=all_tracks[counts >= 3].reset_index(drop=True))
    s = res.summary
    assert s["n_tracks"] == 30
    assert s["n_tracks_D"] == all_tracks["track"].nunique()
    assert s["D_um2_s"] == pytest.approx(_pooled_covariance_D(all_tracks), rel=1e-9)
    # the long (slow) tracks alone give their own, lower D: the option changes the answer
    assert s["sample_fit"]["D_um2_s"] == pytest.approx(_pooled_covariance_D(long), rel=1e-9)
    assert s["sample_fit"]["D_um2_s"] < 0.8 * s["D_um2_s"]
    lo, hi = s["D_ci95_um2_s"]
    assert lo < s["D_um2_s"] < hi


def test_without_the_option_the_sample_D_comes_from_the_analysed_tracks():
    all_tracks = _tracks(2)
    counts = all_tracks.groupby("track")["frame"].transform("size")
    long = all_tracks[counts >= 10].reset_index(drop=True)
    res = analyze_tracks(long, frame_interval_s=DT, exposure_s=0.0, drift_correction=False,
                         estimator="covariance", sizing_tracks=all_tracks)
    assert res.summary["D_um2_s"] == pytest.approx(_pooled_covariance_D(long), rel=1e-9)
    assert res.summary["n_tracks_D"] == 30


def test_the_config_refuses_fewer_than_three_points():
    # the covariance-based estimator needs two steps per track (Vestergaard et al. 2014, eq. 14)
    with pytest.raises(ValidationError, match="sample_min_track_points"):
        Config.model_validate({"inputs": ["a.tif"], "analysis": {"sample_min_track_points": 2}})
    assert Config.model_validate({"inputs": ["a.tif"]}).analysis.sample_min_track_points == 3


def _mixed_length_tracks(positions_short, positions_long, g) -> pd.DataFrame:
    short = positions_to_tracks(positions_short, frame_interval_s=DT,
                                lengths=g.integers(3, positions_short.shape[1] + 1, positions_short.shape[0]))
    long = positions_to_tracks(positions_long, frame_interval_s=DT, first_track_id=10_000)
    return pd.concat([short, long], ignore_index=True)


@pytest.mark.parametrize(("alpha_true", "flag"), [(0.6, "subdiffusive"), (1.0, None)])
def test_movie_sample_alpha_and_flags_use_the_short_tracks_too(alpha_true, flag):
    # fractional Brownian motion with MSD = 2 d K t^alpha (Mandelbrot & Van Ness 1968); the sample alpha of
    # the pooled tracks must hold the truth within twice its own 95 % half-width, and the flag must follow
    g = np.random.default_rng(7)
    kw = dict(alpha=alpha_true, K_um2_s_alpha=0.3, frame_interval_s=DT, exposure_s=DT / 2,
              localization_sd_um=0.02, rng=g)
    tracks = _mixed_length_tracks(fbm_positions(600, 12, **kw), fbm_positions(15, 40, **kw), g)
    counts = tracks.groupby("track")["frame"].transform("size")
    long = tracks[counts >= 10].reset_index(drop=True)
    res = analyze_tracks(long, frame_interval_s=DT, exposure_s=DT / 2, drift_correction=False,
                         sizing_tracks=tracks, sample_tracks=tracks[counts >= 3].reset_index(drop=True))
    s = res.summary
    lo, hi = s["alpha_ci95"]
    assert lo < s["alpha"] < hi
    assert abs(s["alpha"] - alpha_true) < max(hi - lo, 0.05)
    assert s["motion"]["n_tracks_used"] > 300  # the short tracks were pooled, not only the 15 long ones
    if flag:
        assert flag in s["flags"]
    else:
        assert not {"subdiffusive", "superdiffusive"} & set(s["flags"])


def test_an_unusable_sample_set_falls_back_to_the_analysed_tracks():
    # our own contract (no outside source): results equal those of the plain analysis
    g = np.random.default_rng(11)
    pos = brownian_positions(40, 30, D_um2_s=1.0, frame_interval_s=DT, localization_sd_um=0.02, rng=g)
    t = positions_to_tracks(pos, frame_interval_s=DT)
    plain = analyze_tracks(t, frame_interval_s=DT, exposure_s=0.0).summary
    for unusable in (t.iloc[:0], t[t["frame"] < 2]):  # no tracks; only two-point tracks (no step pairs)
        s = analyze_tracks(t, frame_interval_s=DT, exposure_s=0.0, sample_tracks=unusable).summary
        assert s["D_um2_s"] == plain["D_um2_s"]
        assert s["alpha"] == plain["alpha"]
        assert s["flags"] == plain["flags"]


def test_short_unclassified_tracks_do_not_dilute_the_class_flags():
    # Brownian motion reflected in a box (Saxton & Jacobson 1997): the long tracks are classified confined and
    # the sample is flagged so; adding ten times as many short tracks to the sample set (alpha, spreads) must
    # not water the confined fraction down, since short tracks are not classified
    g = np.random.default_rng(3)
    kw = dict(D_um2_s=0.5, box_um=1.0, frame_interval_s=DT, localization_sd_um=0.01, rng=g)
    long = positions_to_tracks(confined_positions(60, 60, **kw), frame_interval_s=DT, first_track_id=10_000)
    short = positions_to_tracks(confined_positions(600, 9, **kw), frame_interval_s=DT,
                                lengths=g.integers(3, 10, 600))
    every = pd.concat([short, long], ignore_index=True)
    plain = analyze_tracks(long, frame_interval_s=DT, exposure_s=0.0, drift_correction=False).summary
    pooled = analyze_tracks(long, frame_interval_s=DT, exposure_s=0.0, drift_correction=False,
                            sizing_tracks=every, sample_tracks=every).summary
    assert "confined" in plain["flags"]
    assert "confined" in pooled["flags"]
    assert pooled["motion"]["numbers"]["fraction_confined"] == plain["motion"]["numbers"]["fraction_confined"]
    assert pooled["motion"]["class_fractions"] == plain["motion"]["class_fractions"]
    assert pooled["motion"]["class_counts"] == plain["motion"]["class_counts"]


def test_a_sample_set_equal_to_the_analysed_tracks_gives_the_plain_analysis():
    # our own contract (no outside source): results equal those of the plain analysis
    g = np.random.default_rng(13)
    pos = brownian_positions(60, 25, D_um2_s=1.0, frame_interval_s=DT, localization_sd_um=0.02, rng=g)
    t = positions_to_tracks(pos, frame_interval_s=DT)
    plain = analyze_tracks(t, frame_interval_s=DT, exposure_s=0.0).summary
    same = analyze_tracks(t, frame_interval_s=DT, exposure_s=0.0, sample_tracks=t.copy()).summary
    for key in ("D_um2_s", "D_ci95_um2_s", "alpha", "alpha_ci95", "flags", "n_tracks_D"):
        assert same[key] == plain[key]


def test_long_exposures_of_fast_particles_get_a_caution():
    from msdkit.pipeline import exposure_caution

    # RMS displacement per axis during the exposure: sqrt(2 D t_E) (Einstein 1905); 100 nm beads in water at
    # 25 °C (D = 4.907 µm²/s, METHODS.md) over 33.3 ms move 0.572 µm, 2.65 spot SDs of 0.216 µm
    kw = dict(frame_interval_s=1 / 30, spot_sigma_um=1.3 * 0.166)
    msg = exposure_caution(4.907, exposure_s=1 / 30, **kw)
    assert msg is not None and "0.57 µm" in msg and "2.7 spot SDs" in msg
    assert exposure_caution(4.907, exposure_s=0.015, **kw) is None  # under half the frame interval
    assert exposure_caution(0.728, exposure_s=1 / 30, frame_interval_s=1 / 30, spot_sigma_um=0.166) is None
    assert exposure_caution(float("nan"), exposure_s=1 / 30, **kw) is None


def test_the_report_shows_the_cautions_and_the_tracks_behind_the_sample_D(tmp_path):
    # our own report contents (no outside source); the text is HTML-escaped (common practice)
    import json

    from msdkit.report.html import _stack_section

    stack = tmp_path / "movie_a"
    stack.mkdir()
    summary = {"D_um2_s": 4.2, "D_ci95_um2_s": [3.9, 4.6], "n_tracks": 58, "n_tracks_D": 610, "flags": [],
               "cautions": ["long exposure: 25 ms of a 33.3 ms frame <check>"]}
    (stack / "summary.json").write_text(json.dumps(summary))
    html_text = _stack_section(stack)
    assert "sample D from 610 tracks of 3 or more points" in html_text
    assert "long exposure: 25 ms of a 33.3 ms frame &lt;check&gt;" in html_text  # escaped
