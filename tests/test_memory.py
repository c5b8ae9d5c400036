"""Freed memory kept for reuse in an analysis (msdkit._memory): pages reused, settings back, same numbers."""

from __future__ import annotations

import resource

import numpy as np
import pytest

from msdkit import _memory
from msdkit.pipeline import analyze_tracks
from msdkit.simulate import brownian_positions, positions_to_tracks

glibc_only = pytest.mark.skipif(_memory._glibc() is None, reason="mallopt is a GNU C library call")


def _faults_of_second_array(n_bytes: int) -> int:
    """Minor page faults while filling an array of n_bytes after an array of the same size was freed."""
    a = np.ones(n_bytes // 8)
    del a
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    b = np.ones(n_bytes // 8)
    after = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    del b
    return after - before


@glibc_only
def test_freed_large_array_pages_are_reused_inside_the_block():
    # 64 MB is above glibc's largest mmap threshold (32 MB; mallopt(3), M_MMAP_THRESHOLD), so outside the
    # block it is mapped afresh each time; inside, the second array reuses the first one's pages (mallopt(3),
    # M_MMAP_MAX = 0, M_TRIM_THRESHOLD): 16,384 pages of 4 kB, of which almost none fault again
    with _memory.freed_memory_kept():
        faults = _faults_of_second_array(64 * 2**20)
    assert faults < 1000


def test_settings_are_restored_after_the_outermost_block():
    # Contract (msdkit._memory.freed_memory_kept): numpy's huge-page setting is put back on leaving.
    was = np._core.multiarray._set_madvise_hugepage(True)
    try:
        with _memory.freed_memory_kept():
            with _memory.freed_memory_kept():  # nested: the outer block still holds the settings
                pass
            assert _memory.active()
            assert np._core.multiarray._set_madvise_hugepage(False) is False  # numpy's advice is off inside
        assert not _memory.active()
        assert np._core.multiarray._set_madvise_hugepage(True) is True  # back to what it was
    finally:
        np._core.multiarray._set_madvise_hugepage(was)


def test_switch_variable_zero_leaves_everything_as_it_is(monkeypatch):
    # Contract (msdkit._memory.SWITCH_VAR): "0" turns the block into one that changes nothing.
    monkeypatch.setenv(_memory.SWITCH_VAR, "0")
    was = np._core.multiarray._set_madvise_hugepage(True)
    try:
        with _memory.freed_memory_kept():
            assert not _memory.active()
            assert np._core.multiarray._set_madvise_hugepage(True) is True
    finally:
        np._core.multiarray._set_madvise_hugepage(was)


def test_analysis_gives_the_same_numbers_with_and_without_kept_memory(monkeypatch):
    # only where memory comes from changes: every column and summary value equal bit for bit
    pos = brownian_positions(60, 60, D_um2_s=0.5, frame_interval_s=0.05, exposure_s=0.02,
                             localization_sd_um=0.03, rng=3)
    tracks = positions_to_tracks(pos, frame_interval_s=0.05)
    kept = analyze_tracks(tracks.copy(), frame_interval_s=0.05, exposure_s=0.02)
    monkeypatch.setenv(_memory.SWITCH_VAR, "0")
    plain = analyze_tracks(tracks.copy(), frame_interval_s=0.05, exposure_s=0.02)
    for name in ("track_fits", "ensemble_msd"):
        a, b = getattr(kept, name), getattr(plain, name)
        assert list(a.columns) == list(b.columns)
        for c in a.columns:
            u, v = a[c].to_numpy(), b[c].to_numpy()
            if u.dtype.kind == "f":
                assert np.array_equal(u, v, equal_nan=True), (name, c)
            else:
                assert np.array_equal(u, v), (name, c)
    assert repr(kept.summary) == repr(plain.summary)
