import hashlib
import json
import os
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pandas as pd
import pytest

from msdkit.io.atomic import (
    TEMP_MARKER,
    file_sha256,
    remove_stale_temp_files,
    start_file_sha256,
    write_bytes_atomic,
    write_csv_atomic,
    write_json_atomic,
    write_parquet_atomic,
    write_text_atomic,
)


def _leftovers(folder):
    return [p.name for p in folder.iterdir() if TEMP_MARKER in p.name]


class _FailsMidway:
    """Writes part of a CSV, then raises, like a writer interrupted by a full disk."""

    def to_csv(self, fh, index=False, **kw):
        fh.write("a,b\n1,2\n" * 1000)
        raise OSError("disk full (simulated)")


def test_csv_writer_that_raises_midway_leaves_the_old_file_and_no_partial_file(tmp_path):
    dest = tmp_path / "table.csv"
    write_text_atomic("old contents\n", dest)
    with pytest.raises(OSError, match="disk full"):
        write_csv_atomic(_FailsMidway(), dest)
    assert dest.read_text() == "old contents\n"
    assert _leftovers(tmp_path) == []


def test_parquet_writer_that_raises_midway_leaves_no_file(tmp_path, monkeypatch):
    import pyarrow.parquet as pq

    real = pq.write_table

    def half_then_fail(table, where, **kw):
        real(table.slice(0, 1), where, **kw)  # something lands on disk under the temporary name
        raise RuntimeError("killed while writing (simulated)")

    monkeypatch.setattr(pq, "write_table", half_then_fail)
    dest = tmp_path / "tracks.parquet"
    with pytest.raises(RuntimeError, match="killed while writing"):
        write_parquet_atomic(pd.DataFrame({"a": np.arange(10)}), dest)
    assert not dest.exists()
    assert _leftovers(tmp_path) == []


def test_json_writer_that_fails_to_serialise_leaves_the_old_file(tmp_path):
    dest = tmp_path / "summary.json"
    write_json_atomic({"D_um2_s": 1.0}, dest)
    with pytest.raises(TypeError, match="cannot write a object to JSON"):
        write_json_atomic({"D_um2_s": object()}, dest)
    assert json.loads(dest.read_text()) == {"D_um2_s": 1.0}
    assert _leftovers(tmp_path) == []


def test_json_writer_turns_nan_and_inf_into_null_and_accepts_numpy_types(tmp_path):
    dest = write_json_atomic(
        {"D": np.float64("nan"), "n": np.int32(7), "ci": np.array([1.5, np.inf]), "ok": np.bool_(True),
         "t": (1, 2.5), "path": tmp_path},
        tmp_path / "s.json",
    )

    # Strict JSON (RFC 8259) has no NaN/Infinity tokens: refuse them while parsing.
    def refuse(token):
        raise ValueError(token)

    data = json.loads(dest.read_text(), parse_constant=refuse)
    assert data == {"D": None, "n": 7, "ci": [1.5, None], "ok": True, "t": [1, 2.5], "path": str(tmp_path)}


def test_writers_round_trip_tables_and_bytes(tmp_path):
    df = pd.DataFrame({"track": np.arange(5, dtype=np.int64), "x_um": np.linspace(0, 1, 5) / 3})
    write_csv_atomic(df, tmp_path / "sub" / "t.csv")  # missing parent folder is created
    pd.testing.assert_frame_equal(pd.read_csv(tmp_path / "sub" / "t.csv"), df)
    write_parquet_atomic(df, tmp_path / "t.parquet")
    pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "t.parquet"), df)
    write_bytes_atomic(b"\x00\x01", tmp_path / "b.bin")
    assert (tmp_path / "b.bin").read_bytes() == b"\x00\x01"



def test_parquet_columns_that_zstd_shrinks_keep_it_and_random_doubles_get_snappy(tmp_path):
    # Parquet stores a codec per column chunk (Apache Parquet format, ColumnMetaData.codec); read back with
    # pyarrow's reader, the table is the same whichever codec each column got
    import pyarrow.parquet as pq

    rng = np.random.default_rng(4)
    n = 200_000
    df = pd.DataFrame({
        "track": np.repeat(np.arange(n // 500, dtype=np.int64), 500),
        "frame": np.tile(np.arange(500, dtype=np.int64), n // 500),
        "x_um": rng.normal(0.0, 5.0, n),  # full-precision random doubles: zstd saves ~3 %
        "tag": ["a", "b"] * (n // 2),
    })
    write_parquet_atomic(df, tmp_path / "t.parquet")
    meta = pq.ParquetFile(tmp_path / "t.parquet").metadata
    codecs = {meta.schema.column(i).name: meta.row_group(0).column(i).compression for i in range(4)}
    assert codecs == {"track": "ZSTD", "frame": "ZSTD", "x_um": "SNAPPY", "tag": "ZSTD"}
    pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "t.parquet"), df)
    write_parquet_atomic(df, tmp_path / "z.parquet", compression="zstd")  # one codec for all, as asked
    meta = pq.ParquetFile(tmp_path / "z.parquet").metadata
    assert {meta.row_group(0).column(i).compression for i in range(4)} == {"ZSTD"}
    pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "z.parquet"), df)

def _edge_and_random_floats(n, seed):
    """Edge values of IEEE 754 doubles and random numbers over the whole double range."""
    g = np.random.default_rng(seed)
    edges = [0.0, -0.0, 1.0, -2.0, 0.5, 1e-4, 9.999999999999999e-05, 1e-5, 1e-7, 123456.0, 1e9,
             9999999999.999998, 1e10, 12345678901.5, 1e15, 1e16, 1.2345e16, 1e22, 1e-300, 5e-324,
             1.7976931348623157e308, np.inf, -np.inf, np.nan, 0.1, 1 / 3, 2e-5 / 3, 123456789012345.6,
             9999999999999998.0]
    parts = [g.standard_normal(n) * 10.0 ** g.integers(-320, 300, n),   # every decade
             g.integers(-10**6, 10**6, n).astype(float),               # whole numbers
             g.standard_normal(n) * 10.0 ** g.integers(-6, 12, n)]     # around both notation switches
    return np.concatenate([edges, *parts])


def test_fast_csv_text_is_byte_for_byte_what_pandas_writes(tmp_path):
    from msdkit.io.csvtext import csv_bytes

    # reference: pandas' own DataFrame.to_csv (numpy's shortest round-trip float text, csv.QUOTE_MINIMAL)
    x = _edge_and_random_floats(20_000, seed=3)
    n = x.size // 2
    df = pd.DataFrame({
        "a_um": x[:n], "b": x[n:2 * n], "track": np.arange(n, dtype=np.int64) - 7,
        "ok": np.arange(n) % 3 == 0, "cls": np.where(np.arange(n) % 2, "normal", "sub diffusive"),
        "count": pd.array([None if i % 5 == 0 else i for i in range(n)], dtype="Int64"),
        "label": np.array(["a" if i % 4 else None for i in range(n)], dtype=object),
    })
    df.loc[3, "cls"] = np.nan
    data = csv_bytes(df)
    assert data is not None and data == df.to_csv(index=False).encode()
    write_csv_atomic(df, tmp_path / "t.csv")
    assert (tmp_path / "t.csv").read_bytes() == data
    back = pd.read_csv(tmp_path / "t.csv")
    np.testing.assert_array_equal(back["a_um"].to_numpy(), df["a_um"].to_numpy())  # exact round trip


@pytest.mark.parametrize("column", [
    ["a,b", "c"],                                     # a delimiter: pandas quotes the field
    ['say "x"', "c"],                                 # a quote
    ["line\nbreak", "c"],                            # a line break
    np.array([1.5, 2.5], dtype=np.float32),           # float32 text differs from float64 text
    pd.to_datetime(["2026-01-01", "2026-01-02"]),     # a type the fast path does not format
])
def test_tables_the_fast_csv_text_does_not_cover_are_written_by_pandas(tmp_path, column):
    from msdkit.io.csvtext import csv_bytes

    df = pd.DataFrame({"v": column, "i": [1, 2]})
    assert csv_bytes(df) is None
    write_csv_atomic(df, tmp_path / "t.csv")
    assert (tmp_path / "t.csv").read_bytes() == df.to_csv(index=False).encode()


def test_sha256_matches_the_published_test_vector_and_hashlib_across_chunks(tmp_path):
    f = tmp_path / "abc.txt"
    f.write_bytes(b"abc")
    # FIPS 180-2, Appendix B.1: SHA-256("abc").
    assert file_sha256(f) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    data = np.random.default_rng(0).bytes(100_003)
    g = tmp_path / "big.bin"
    g.write_bytes(data)
    assert file_sha256(g, chunk_bytes=4096) == hashlib.sha256(data).hexdigest()


def test_a_file_hashed_in_the_background_gives_hashlibs_digest_and_is_read_once(tmp_path, monkeypatch):
    import msdkit.io.atomic as atomic

    data = np.random.default_rng(1).bytes(300_001)
    f = tmp_path / "input.bin"
    f.write_bytes(data)
    reads = []
    real = atomic._sha256_of
    monkeypatch.setattr(atomic, "_sha256_of", lambda p, n: reads.append(p) or real(p, n))
    future = start_file_sha256(f)
    # reference: Python's hashlib over the whole content at once
    assert file_sha256(f) == future.result() == hashlib.sha256(data).hexdigest()
    assert len(reads) == 1


def test_a_changed_file_is_hashed_again(tmp_path):
    f = tmp_path / "input.bin"
    f.write_bytes(b"abc")
    assert file_sha256(f) == hashlib.sha256(b"abc").hexdigest()
    f.write_bytes(b"abd")  # same size; a later modification time
    st = f.stat()
    os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns + 10_000_000))
    assert file_sha256(f) == hashlib.sha256(b"abd").hexdigest()
    assert start_file_sha256(tmp_path / "missing.bin").exception() is not None


def test_remove_stale_temp_files_removes_only_temporary_files(tmp_path):
    keep = tmp_path / "summary.json"
    keep.write_text("{}")
    stale = tmp_path / f".summary.json{TEMP_MARKER}abc123"
    stale.write_text("{")
    assert remove_stale_temp_files(tmp_path) == [stale]
    assert keep.exists() and not stale.exists()


_WRITER = textwrap.dedent(
    """
    import sys
    from msdkit.io.atomic import write_bytes_atomic
    dest = sys.argv[1]
    i = 0
    print("ready", flush=True)
    while True:
        i += 1
        block = bytes([i % 251]) * (8 << 20)   # 8 MB of one repeated byte
        write_bytes_atomic(block, dest)
    """
)


def test_file_killed_with_sigkill_while_writing_is_old_or_new_never_partial(tmp_path):
    dest = tmp_path / "data.bin"
    proc = subprocess.Popen([sys.executable, "-c", _WRITER, str(dest)], stdout=subprocess.PIPE,
                            cwd=os.getcwd(), env={**os.environ, "PYTHONPATH": os.getcwd()})
    try:
        assert proc.stdout.readline().strip() == b"ready"
        deadline = time.monotonic() + 20
        while not dest.exists() and time.monotonic() < deadline:
            time.sleep(0.01)
        time.sleep(0.3)  # let it be mid-way through some later write
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        proc.stdout.close()
    data = dest.read_bytes()
    assert len(data) == 8 << 20
    assert data.count(data[:1]) == len(data)  # one complete block, not a mix of two
    remove_stale_temp_files(tmp_path)
    assert _leftovers(tmp_path) == []
