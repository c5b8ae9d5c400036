"""Steps between consecutive frames of every track, as the estimators of D use them.

A gap (missed frame) splits a track into segments of consecutive frames. Estimators use only steps inside a
segment: a two-frame displacement is never taken for a one-frame step. For Brownian motion observed with
localisation error and motion blur the steps of different segments are independent (their Brownian parts
cover disjoint time intervals and every position carries its own noise), so a track's likelihood is the
product of its segments' likelihoods.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.fft

from ..msd import _Tracks


@dataclass(frozen=True)
class Steps:
    """Per-track step statistics (arrays of length n_tracks) and the flat steps themselves.

    Attributes
    ----------
    ids : track ids; n_points : positions per track; n_steps : steps between consecutive frames;
    n_pairs : pairs of adjacent steps (both inside one segment); sum_sq : sum over steps and axes of the
    squared step, µm²; sum_cross : sum over adjacent step pairs and axes of the product, µm².
    steps : (n_steps_total, n_dims) steps, µm; step_track : track index of each step; seg_start,
    seg_len, seg_track : segments as runs of steps.
    """

    ids: np.ndarray
    n_points: np.ndarray
    n_steps: np.ndarray
    n_pairs: np.ndarray
    sum_sq: np.ndarray
    sum_cross: np.ndarray
    steps: np.ndarray
    step_track: np.ndarray
    seg_start: np.ndarray
    seg_len: np.ndarray
    seg_track: np.ndarray
    n_dims: int


def collect_steps(tracks: pd.DataFrame, n_dims: int) -> Steps:
    """Collect the steps between consecutive frames, grouped by track and segment (see module notes)."""
    from .. import _msd_kernels as k

    tr = _Tracks(tracks, n_dims)
    c = tr.coords + [tr.coords[0]] * (3 - n_dims)
    steps, step_track, seg_start, seg_len, n_steps, n_pairs, sum_sq, sum_cross = k.step_statistics(
        c[0], c[1], c[2], n_dims, tr.frame, tr.start, tr.count)
    return Steps(
        ids=tr.ids, n_points=tr.count, n_steps=n_steps, n_pairs=n_pairs, sum_sq=sum_sq, sum_cross=sum_cross,
        steps=steps, step_track=step_track, seg_start=seg_start, seg_len=seg_len,
        seg_track=step_track[seg_start], n_dims=n_dims,
    )


def _axis_power(coef: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Sum over the last axis of coef squared, into out: numpy.einsum("smd,smd->sm", coef, coef) bit for bit.

    For one or two axes as products added in axis order (the order einsum adds them in), written straight into
    ``out`` instead of a fresh array that is then copied; three axes go through einsum itself, whose sum of
    three products is ordered otherwise.
    """
    if coef.shape[-1] > 2:
        out[...] = np.einsum("smd,smd->sm", coef, coef)
        return out
    np.multiply(coef[..., 0], coef[..., 0], out=out)
    for j in range(1, coef.shape[-1]):
        out += coef[..., j] * coef[..., j]
    return out


def sine_modes(st: Steps) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Discrete-sine-transform modes of every segment's steps.

    Returns
    -------
    lam : (n_steps_total,) eigenvalue factors lambda_k = 2 (1 - cos(pi k / (m + 1))), k = 1..m for a
        segment of m steps.
    power : (n_steps_total,) sum over axes of the squared orthonormal DST-I coefficient.
    mode_track : (n_steps_total,) track index of each mode, sorted by track.

    Notes
    -----
    The steps of one segment have the tridiagonal covariance b I + a T (T = tridiag(-1, 2, -1)) per axis,
    which the orthonormal DST-I diagonalises with eigenvalues psi_k = b + a lambda_k (Berglund 2010, Phys.
    Rev. E 82:011917; Vestergaard, Blainey & Flyvbjerg 2014, Phys. Rev. E 89:022726).
    """
    total = st.steps.shape[0]
    lam = np.empty(total)
    power = np.empty(total)
    if total == 0:
        return lam, power, np.zeros(0, np.int64)
    order = np.argsort(st.seg_len, kind="stable")
    lens = st.seg_len[order]
    bounds = np.flatnonzero(np.diff(lens)) + 1
    for grp in np.split(order, bounds):
        m = int(st.seg_len[grp[0]])
        lam_m = 2.0 * (1.0 - np.cos(np.pi * np.arange(1, m + 1) / (m + 1)))
        s0 = int(st.seg_start[grp[0]])
        if np.array_equal(st.seg_start[grp], s0 + m * np.arange(grp.size)):  # back to back: views
            sl = slice(s0, s0 + m * grp.size)
            coef = scipy.fft.dst(st.steps[sl].reshape(grp.size, m, -1), type=1, axis=1, norm="ortho")
            _axis_power(coef, power[sl].reshape(grp.size, m))
            lam[sl].reshape(grp.size, m)[:] = lam_m
            continue
        idx = st.seg_start[grp][:, None] + np.arange(m)[None, :]
        coef = scipy.fft.dst(st.steps[idx], type=1, axis=1, norm="ortho")  # (n_seg, m, n_dims)
        power[idx] = _axis_power(coef, np.empty(coef.shape[:2]))
        lam[idx] = lam_m[None, :]
    return lam, power, st.step_track
