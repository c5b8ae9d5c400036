"""Stack reader: formats, metadata, chunked reading and clear errors for broken inputs."""

from __future__ import annotations

import struct

import numpy as np
import pytest
import tifffile

from msdkit.errors import InputError
from msdkit.io.stacks import open_stack
from msdkit.simulate import recipe_from_dict, render_scene, write_scene


def _movie(n=12, ny=16, nx=20, dtype=np.uint16, seed=0):
    return np.random.default_rng(seed).integers(0, 4000, (n, ny, nx)).astype(dtype)


# ------------------------------------------------------------------------------------------ formats ----
def test_simulated_ome_movie_round_trips_pixels_and_metadata(tmp_path):
    # OME-XML 2016-06 schema: Pixels@PhysicalSizeX (+Unit), Pixels@TimeIncrement (+Unit),
    # Plane@ExposureTime (+Unit) — written by the simulator, read back by the reader.
    rec = recipe_from_dict(
        {
            "name": "roundtrip",
            "width_px": 40,
            "height_px": 30,
            "n_frames": 9,
            "pixel_size_um": 0.107,
            "frame_interval_s": 0.05,
            "exposure_s": 0.03,
            "seed": 4,
            "populations": [{"count_in_view": 5}],
        }
    )
    movie_path = write_scene(rec, tmp_path)[0]
    frames, _, _ = render_scene(rec)
    with open_stack(movie_path) as stack:
        assert stack.kind == "ome-tiff"
        assert stack.n_frames == 9 and stack.frame_shape == (30, 40) and stack.dtype == np.uint16
        assert stack.metadata == {"pixel_size_um": 0.107, "frame_interval_s": 0.05, "exposure_s": 0.03}
        np.testing.assert_array_equal(stack.read_frames(0, 9), frames.astype(np.float32))


def test_ome_units_are_converted_to_micrometres_and_seconds(tmp_path):
    # OME UnitsLength / UnitsTime symbols (OME-XML 2016-06): nm -> µm, ms -> s.
    p = tmp_path / "units.ome.tif"
    n = 6
    tifffile.imwrite(
        p,
        _movie(n),
        ome=True,
        metadata={
            "axes": "TYX",
            "PhysicalSizeX": 166.0,
            "PhysicalSizeXUnit": "nm",
            "PhysicalSizeY": 166.0,
            "PhysicalSizeYUnit": "nm",
            "TimeIncrement": 33.3,
            "TimeIncrementUnit": "ms",
            "Plane": {"ExposureTime": [15.0] * n, "ExposureTimeUnit": ["ms"] * n},
        },
    )
    with open_stack(p) as stack:
        assert stack.metadata["pixel_size_um"] == pytest.approx(0.166)
        assert stack.metadata["frame_interval_s"] == pytest.approx(0.0333)
        assert stack.metadata["exposure_s"] == pytest.approx(0.015)


def test_ome_frame_interval_falls_back_to_plane_time_stamps(tmp_path):
    # Without Pixels@TimeIncrement, the interval is the median step of Plane@DeltaT (OME-XML 2016-06).
    p = tmp_path / "deltat.ome.tif"
    n = 8
    tifffile.imwrite(
        p,
        _movie(n),
        ome=True,
        metadata={
            "axes": "TYX",
            "Plane": {"DeltaT": [0.1 * k for k in range(n)], "DeltaTUnit": ["s"] * n},
        },
    )
    with open_stack(p) as stack:
        assert stack.metadata["frame_interval_s"] == pytest.approx(0.1)
        assert stack.metadata["pixel_size_um"] is None and stack.metadata["exposure_s"] is None


def test_imagej_hyperstack_gives_pixel_size_and_frame_interval(tmp_path):
    # ImageJ TIFF: pixel size = 1 / XResolution in the 'unit' of the description, frame interval 'finterval'
    # in seconds (ImageJ hyperstack conventions; common practice).
    p = tmp_path / "ij.tif"
    tifffile.imwrite(
        p,
        _movie(10),
        imagej=True,
        resolution=(1 / 0.2, 1 / 0.2),
        metadata={"axes": "TYX", "finterval": 0.05, "unit": "um"},
    )
    with open_stack(p) as stack:
        assert stack.kind == "imagej-tiff" and stack.n_frames == 10
        assert stack.metadata["pixel_size_um"] == pytest.approx(0.2)
        assert stack.metadata["frame_interval_s"] == pytest.approx(0.05)


def test_plain_multipage_tiff_has_no_metadata(tmp_path):
    p = tmp_path / "plain.tif"
    tifffile.imwrite(p, _movie(5), metadata=None)
    with open_stack(p) as stack:
        assert stack.kind == "tiff" and stack.n_frames == 5
        assert stack.metadata == {"pixel_size_um": None, "frame_interval_s": None, "exposure_s": None}


def test_folder_of_single_images_is_read_in_natural_order(tmp_path):
    # frame_2 comes before frame_10 (natural sort, common practice for numbered image sequences).
    data = _movie(12)
    folder = tmp_path / "seq"
    folder.mkdir()
    for k in range(12):
        tifffile.imwrite(folder / f"frame_{k}.tif", data[k])
    (folder / "notes.txt").write_text("not an image")
    with open_stack(folder) as stack:
        assert stack.kind == "folder" and stack.n_frames == 12 and stack.frame_shape == (16, 20)
        np.testing.assert_array_equal(stack.read_frames(0, 12), data.astype(np.float32))


@pytest.mark.parametrize("kind", ["plain", "zlib", "imagej", "ome", "folder"])
def test_chunked_reading_equals_whole_reading(tmp_path, kind):
    data = _movie(23, seed=3)
    if kind == "folder":
        path = tmp_path / "frames"
        path.mkdir()
        for k in range(23):
            tifffile.imwrite(path / f"img{k:03d}.tif", data[k])
    else:
        path = tmp_path / f"{kind}.tif"
        kw = {
            "plain": {},
            "zlib": {"compression": "zlib"},
            "imagej": {"imagej": True, "metadata": {"axes": "TYX"}},
            "ome": {"ome": True, "metadata": {"axes": "TYX"}},
        }[kind]
        tifffile.imwrite(path, data, **kw)
    with open_stack(path) as stack:
        whole = stack.read_frames(0, stack.n_frames)
        chunks = list(stack.iter_chunks(5))
    assert whole.dtype == np.float32
    np.testing.assert_array_equal(whole, data.astype(np.float32))
    assert [first for first, _ in chunks] == [0, 5, 10, 15, 20]
    assert [len(c) for _, c in chunks] == [5, 5, 5, 5, 3]
    np.testing.assert_array_equal(np.concatenate([c for _, c in chunks]), whole)


def test_one_channel_of_a_multichannel_movie_can_be_chosen(tmp_path):
    data = _movie(6)
    two = np.stack([data, data + 1], axis=1)  # T, C, Y, X
    p = tmp_path / "tc.ome.tif"
    tifffile.imwrite(p, two, ome=True, metadata={"axes": "TCYX"})
    with open_stack(p, channel=1) as stack:
        assert stack.n_frames == 6
        np.testing.assert_array_equal(stack.read_frames(0, 6), (data + 1).astype(np.float32))
    rgb = tmp_path / "rgb.tif"
    tifffile.imwrite(rgb, np.stack([data, data + 2, data + 3], axis=-1).astype(np.uint16), photometric="rgb")
    with open_stack(rgb, channel=2) as stack:
        np.testing.assert_array_equal(stack.read_frames(2, 4), (data[2:4] + 3).astype(np.float32))


# ------------------------------------------------------------------------------------- broken inputs ----
def test_missing_file_says_nothing_is_there(tmp_path):
    with pytest.raises(
        InputError, match=r"must be an existing TIFF.*got nothing at that path\. Check the path"
    ):
        open_stack(tmp_path / "absent.tif")


def test_file_that_is_not_a_tiff_is_rejected(tmp_path):
    p = tmp_path / "movie.tif"
    p.write_text("this is a text file, not an image")
    with pytest.raises(
        InputError,
        match=r"movie.tif must be a TIFF or OME-TIFF movie; got a file that does not "
        r"start with a TIFF header .*Convert the movie",
    ):
        open_stack(p)


def test_empty_file_is_rejected(tmp_path):
    p = tmp_path / "empty.tif"
    p.write_bytes(b"")
    with pytest.raises(InputError, match=r"got an empty file \(0 bytes\)"):
        open_stack(p)


def test_tiff_without_frames_is_rejected(tmp_path):
    # A valid TIFF header whose first-IFD offset is 0: the file holds no images (TIFF 6.0, section 2).
    p = tmp_path / "noframes.tif"
    p.write_bytes(b"II*\x00" + struct.pack("<I", 0))
    with pytest.raises(
        InputError, match=r"must be a movie with at least 2 frames; got a TIFF that holds no images"
    ):
        open_stack(p)


@pytest.mark.parametrize("fraction", [0.5, 0.999])
@pytest.mark.parametrize("compression", [None, "zlib"])
def test_truncated_file_is_reported_as_truncated(tmp_path, fraction, compression):
    full = tmp_path / "full.tif"
    tifffile.imwrite(full, _movie(20), compression=compression)
    cut = tmp_path / "cut.tif"
    blob = full.read_bytes()
    cut.write_bytes(blob[: int(len(blob) * fraction)])
    with pytest.raises(
        InputError, match=r"cut.tif must be a complete TIFF file; got a (damaged or )?truncated"
    ):
        with open_stack(cut) as stack:
            stack.read_frames(0, stack.n_frames)


def test_single_frame_cannot_be_tracked(tmp_path):
    p = tmp_path / "one.tif"
    tifffile.imwrite(p, _movie(1)[0])
    with pytest.raises(InputError, match=r"at least 2 frames \(motion needs two time points\); got 1 frame"):
        open_stack(p)


def test_multichannel_movie_without_a_channel_choice_is_rejected(tmp_path):
    p = tmp_path / "tc.tif"
    tifffile.imwrite(p, np.stack([_movie(4)] * 3, axis=1), imagej=True, metadata={"axes": "TCYX"})
    with pytest.raises(InputError, match=r"must be a single-channel movie; got 3 channels .*channel=k"):
        open_stack(p)
    rgb = tmp_path / "rgb.tif"
    tifffile.imwrite(rgb, np.stack([_movie(4, dtype=np.uint8)] * 3, axis=-1), photometric="rgb")
    with pytest.raises(InputError, match=r"got 3 channels"):
        open_stack(rgb)


def test_time_and_depth_stacked_together_are_rejected(tmp_path):
    p = tmp_path / "tz.tif"
    tifffile.imwrite(p, _movie(12).reshape(3, 4, 16, 20), imagej=True, metadata={"axes": "TZYX"})
    with pytest.raises(InputError, match=r"must be a time series of 2D frames .*got axes 'TZYX'"):
        open_stack(p)


def test_nan_frame_is_found_when_its_chunk_is_read(tmp_path):
    data = _movie(10).astype(np.float32)
    data[7, 3, 4] = np.nan
    data[7, 5, 5] = np.inf
    p = tmp_path / "float.tif"
    tifffile.imwrite(p, data)
    with open_stack(p) as stack:  # opening does not read pixels
        first, chunk = next(stack.iter_chunks(5))
        np.testing.assert_array_equal(chunk, data[:5])
        with pytest.raises(
            InputError, match=r"float.tif: frame 7 must be finite numbers in every pixel; got 2 NaN"
        ):
            stack.read_frames(5, 10)


def test_folder_frame_of_another_size_is_named(tmp_path):
    folder = tmp_path / "seq"
    folder.mkdir()
    for k in range(4):
        tifffile.imwrite(folder / f"f{k}.tif", _movie(1, ny=16 if k != 2 else 18)[0])
    with open_stack(folder) as stack:
        stack.read_frames(0, 2)
        with pytest.raises(
            InputError, match=r"f2.tif \(frame 2 of folder seq\) must be one frame of shape \(16, 20\)"
        ):
            stack.read_frames(0, 4)


def test_folder_without_tiffs_is_rejected(tmp_path):
    (tmp_path / "a.txt").write_text("x")
    with pytest.raises(InputError, match=r"a folder of TIFF images .*got no TIFF files"):
        open_stack(tmp_path)


def test_reading_outside_the_movie_is_a_value_error(tmp_path):
    p = tmp_path / "m.tif"
    tifffile.imwrite(p, _movie(4), photometric="minisblack")
    with open_stack(p) as stack, pytest.raises(ValueError, match=r"frame range"):
        stack.read_frames(2, 9)
