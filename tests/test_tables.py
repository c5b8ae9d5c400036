import numpy as np
import pandas as pd
import pytest

from msdkit.errors import InputError
from msdkit.io.tables import read_track_table
from msdkit.schema import TRACK_COLUMNS
from msdkit.simulate import brownian_positions, positions_to_tracks


def _write(tmp_path, text, name="t.csv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def _simulated_tracks(seed=0, n_tracks=30, n_points=50):
    pos = brownian_positions(n_tracks, n_points, D_um2_s=0.5, frame_interval_s=0.05, rng=seed)
    return positions_to_tracks(pos, frame_interval_s=0.05)


def test_track_table_round_trips_simulated_tracks_through_csv_and_parquet(tmp_path):
    tracks = _simulated_tracks()
    shuffled = tracks.sample(frac=1.0, random_state=1)[["track", "frame", "x_um", "y_um"]]
    shuffled.to_csv(tmp_path / "t.csv", index=False)
    shuffled.to_parquet(tmp_path / "t.parquet", index=False)
    expected = tracks.sort_values(["track", "frame"]).reset_index(drop=True)[list(TRACK_COLUMNS)]
    expected = expected.astype(TRACK_COLUMNS)
    for name in ("t.csv", "t.parquet"):
        got = read_track_table(tmp_path / name, frame_interval_s=0.05)
        assert list(got.columns) == list(TRACK_COLUMNS)
        assert got.dtypes.astype(str).to_dict() == TRACK_COLUMNS
        # CSV text keeps 17 significant digits (pandas' round-trip float format), so values come back exact.
        pd.testing.assert_frame_equal(got, expected, check_exact=False, rtol=1e-12, atol=0)


def test_pixel_positions_are_converted_with_the_pixel_size(tmp_path):
    p = _write(tmp_path, "track,frame,x_px,y_px\n0,0,10,20\n0,1,12,21\n")
    got = read_track_table(p, pixel_size_um=0.1, frame_interval_s=0.5)
    np.testing.assert_allclose(got["x_um"], [1.0, 1.2])
    np.testing.assert_allclose(got["y_um"], [2.0, 2.1])
    np.testing.assert_allclose(got["time_s"], [0.0, 0.5])


def test_common_column_spellings_are_accepted_when_unambiguous(tmp_path):
    p = _write(tmp_path, "Particle;Frame;X (µm);Y (µm);intensity\n3;1;0.5;0.25;100\n3;0;0.4;0.2;90\n")
    got = read_track_table(p, frame_interval_s=1.0)
    assert got["frame"].tolist() == [0, 1]
    assert got["x_um"].tolist() == [0.4, 0.5]


def test_text_track_labels_are_numbered_in_sorted_order(tmp_path):
    p = _write(tmp_path, "track,frame,x_um,y_um\nb,0,1,1\na,0,2,2\nb,1,3,3\n")
    got = read_track_table(p, frame_interval_s=1.0)
    assert got["track"].tolist() == [0, 1, 1]
    assert got["x_um"].tolist() == [2.0, 1.0, 3.0]


def test_missing_columns_are_named_with_what_is_expected(tmp_path):
    p = _write(tmp_path, "track,frame,x_um\n0,0,1\n")
    with pytest.raises(InputError, match=r"missing column\(s\) y_um; expected track, frame, x_um, y_um"):
        read_track_table(p, frame_interval_s=1.0)


def test_positions_without_units_are_refused_with_a_rename_hint(tmp_path):
    p = _write(tmp_path, "track,frame,x,y\n0,0,1,1\n")
    with pytest.raises(InputError, match=r"'x', 'y' have no unit: rename them x_um, y_um"):
        read_track_table(p, frame_interval_s=1.0)


def test_two_columns_meaning_the_same_thing_are_refused(tmp_path):
    p = _write(tmp_path, "track,particle,frame,x_um,y_um\n0,0,0,1,1\n")
    with pytest.raises(InputError, match=r"columns 'track', 'particle' all mean 'track'"):
        read_track_table(p, frame_interval_s=1.0)


def test_non_numeric_positions_are_reported_with_value_and_row(tmp_path):
    p = _write(tmp_path, "track,frame,x_um,y_um\n0,0,1.0,1\n0,1,abc,2\n")
    with pytest.raises(InputError, match=r"column 'x_um' must hold numbers; got 'abc' in data row 2"):
        read_track_table(p, frame_interval_s=1.0)


def test_non_numeric_value_far_down_a_long_file_is_reported(tmp_path):
    # pyarrow infers column types from the first block; a bad value later must still be found and named.
    n = 300_000
    df = pd.DataFrame({"track": np.repeat(np.arange(n // 100), 100),
                       "frame": np.tile(np.arange(100), n // 100), "x_um": 0.5, "y_um": 0.25})
    text = df.to_csv(index=False)
    text = text + "9999,0,oops,1\n"
    p = _write(tmp_path, text)
    with pytest.raises(InputError, match=rf"got 'oops' in data row {n + 1}"):
        read_track_table(p, frame_interval_s=1.0)


def test_nan_and_empty_values_are_refused(tmp_path):
    p = _write(tmp_path, "track,frame,x_um,y_um\n0,0,1,1\n0,1,NaN,2\n")
    with pytest.raises(InputError, match=r"'x_um' has 1 empty or NaN value\(s\) \(first in data row 2\)"):
        read_track_table(p, frame_interval_s=1.0)
    q = tmp_path / "t.parquet"
    bad = pd.DataFrame({"track": [0, 0], "frame": [0, 1], "x_um": [1.0, np.inf], "y_um": [1.0, 2.0]})
    bad.to_parquet(q)
    with pytest.raises(InputError, match=r"'x_um' has 1 NaN or infinite value\(s\)"):
        read_track_table(q, frame_interval_s=1.0)


def test_duplicate_track_frame_rows_are_refused(tmp_path):
    p = _write(tmp_path, "track,frame,x_um,y_um\n0,0,1,1\n1,0,1,1\n0,0,2,2\n")
    with pytest.raises(InputError, match=r"1 duplicate \(track, frame\) row\(s\), e.g. track 0 frame 0"):
        read_track_table(p, frame_interval_s=1.0)


def test_fractional_and_negative_frames_are_refused(tmp_path):
    p = _write(tmp_path, "track,frame,x_um,y_um\n0,0.0,1,1\n0,0.5,1,1\n")
    with pytest.raises(InputError, match=r"'frame' must hold whole numbers; got 0.5 in data row 2"):
        read_track_table(p, frame_interval_s=1.0)
    q = _write(tmp_path, "track,frame,x_um,y_um\n0,-1,1,1\n", name="neg.csv")
    with pytest.raises(InputError, match=r"frame indices >= 0; got -1"):
        read_track_table(q, frame_interval_s=1.0)


def test_pixel_positions_without_pixel_size_are_refused(tmp_path):
    p = _write(tmp_path, "track,frame,x_px,y_px\n0,0,1,1\n")
    with pytest.raises(InputError, match=r"pixel_size_um .* must be a number > 0 .*; got None. Set acq"):
        read_track_table(p, frame_interval_s=1.0)


def test_missing_frame_interval_and_unknown_file_type_are_refused(tmp_path):
    p = _write(tmp_path, "track,frame,x_um,y_um\n0,0,1,1\n")
    with pytest.raises(InputError, match=r"frame_interval_s must be a number > 0 .*; got None"):
        read_track_table(p, frame_interval_s=None)
    q = _write(tmp_path, "{}", name="t.json")
    with pytest.raises(InputError, match=r"track table type must be one of .*; got '.json'"):
        read_track_table(q, frame_interval_s=1.0)


def test_empty_headerless_and_binary_files_are_refused(tmp_path):
    empty = _write(tmp_path, "", name="empty.csv")
    with pytest.raises(InputError, match="the track table is empty"):
        read_track_table(empty, frame_interval_s=1.0)
    header_only = _write(tmp_path, "track,frame,x_um,y_um\n", name="header.csv")
    with pytest.raises(InputError, match="has a header but no rows"):
        read_track_table(header_only, frame_interval_s=1.0)
    binary = tmp_path / "bin.csv"
    binary.write_bytes(b"II*\x00\x08\x00\x00\x00\x00\x00")
    with pytest.raises(InputError, match="not a text table"):
        read_track_table(binary, frame_interval_s=1.0)
    bad_parquet = _write(tmp_path, "track,frame\n", name="bad.parquet")
    with pytest.raises(InputError, match="not a readable Parquet file"):
        read_track_table(bad_parquet, frame_interval_s=1.0)


def test_table_is_read_with_freed_memory_kept_and_the_settings_put_back(tmp_path, monkeypatch):
    # numpy's huge-page advice would make the kernel assemble 2 MB pages for the table's new arrays
    # (madvise(2), MADV_HUGEPAGE; msdkit._memory); the read runs without it and puts it back afterwards
    from msdkit import _memory
    from msdkit.io import tables

    _simulated_tracks()[["track", "frame", "x_um", "y_um"]].to_parquet(tmp_path / "t.parquet", index=False)
    seen = []
    column = tables._column

    def spy(*args, **kwargs):
        seen.append(_memory.active())
        return column(*args, **kwargs)

    monkeypatch.setattr(tables, "_column", spy)
    was = np._core.multiarray._set_madvise_hugepage(True)
    try:
        got = read_track_table(tmp_path / "t.parquet", frame_interval_s=0.05)
        assert np._core.multiarray._set_madvise_hugepage(True) is True
    finally:
        np._core.multiarray._set_madvise_hugepage(was)
    assert seen and all(seen)
    assert not _memory.active()
    assert len(got) == 30 * 50
