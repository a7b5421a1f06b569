"""Lazy TIFF / OME-TIFF camera stacks: metadata, memory map, page reads, bad inputs."""

import json

import numpy as np
import pytest
import tifffile

from lasecyto.exceptions import InputError
from lasecyto.io._images import read_image_stack
from lasecyto.synth._patterns import write_pattern_stack


def test_ome_metadata_memmap_and_blocks(tmp_path):
    path = tmp_path / "cells.ome.tif"
    write_pattern_stack(path, n_frames=12, shape=(48, 64), n_cells=1, pixel_size_um=0.65, frame_interval_s=2.5,
                        sidecar=False, min_separation_px=10.0, rng=1)
    with read_image_stack(path) as st:
        assert st.shape == (12, 48, 64) and not st.memmapped and st.dtype == np.uint16
        assert st.frame_interval_s == pytest.approx(2.5) and st.pixel_size_um == pytest.approx(0.65)
        np.testing.assert_allclose(st.time_s, np.arange(12) * 2.5)
        whole = tifffile.imread(path)
        np.testing.assert_array_equal(st[3:7], whole[3:7])
        np.testing.assert_array_equal(st[-1], whole[-1])
        starts = [s for s, b in st.blocks(5)]
        assert starts == [0, 5, 10]
    with read_image_stack(path, memmap=True) as mm:
        assert mm.memmapped
        np.testing.assert_array_equal(mm[2:9], whole[2:9])


def test_big_endian_contiguous_stack(tmp_path):
    data = np.arange(4 * 6 * 7, dtype=np.uint16).reshape(4, 6, 7)
    path = tmp_path / "be.tif"
    tifffile.imwrite(path, data, byteorder=">", photometric="minisblack")
    with read_image_stack(path) as st:
        np.testing.assert_array_equal(st[1:3], data[1:3])
        assert st[1:3].dtype.isnative


def test_compressed_stack_is_read_page_by_page(tmp_path):
    data = np.arange(5 * 8 * 9, dtype=np.uint16).reshape(5, 8, 9)
    path = tmp_path / "c.tif"
    tifffile.imwrite(path, data, compression="zlib")
    with read_image_stack(path) as st:
        assert not st.memmapped
        np.testing.assert_array_equal(st[1:4], data[1:4])


def test_rgb_tiff_is_refused(tmp_path):
    path = tmp_path / "rgb.tif"
    tifffile.imwrite(path, np.zeros((8, 8, 3), np.uint8), photometric="rgb")
    with pytest.raises(InputError, match="colour image where grayscale frames are expected"):
        read_image_stack(path)


def test_sidecar_frame_count_must_agree(tmp_path):
    path = tmp_path / "s.tif"
    write_pattern_stack(path, n_frames=6, shape=(48, 48), n_cells=1, min_separation_px=10.0, ome=False, rng=2)
    with read_image_stack(path) as st:
        assert len(st.time_s) == 6  # the auto sidecar fits
    path.with_suffix(".json").write_text(json.dumps({"frame_times_s": [0.0, 1.0, 2.0]}))
    with pytest.raises(InputError, match=r"frame count of the stack disagrees with its sidecar.*expected 6 values"):
        read_image_stack(path)
    with read_image_stack(path, sidecar=None) as st:
        assert st.n_frames == 6


def test_missing_and_broken_files(tmp_path):
    with pytest.raises(InputError, match="not found"):
        read_image_stack(tmp_path / "none.tif")
    bad = tmp_path / "bad.tif"
    bad.write_bytes(b"not a tiff at all")
    with pytest.raises(InputError, match="not a readable TIFF"):
        read_image_stack(bad)


def test_streamed_analysis_from_disk(tmp_path):
    from lasecyto.patterns import patterns_table

    path = tmp_path / "a.ome.tif"
    truth = write_pattern_stack(path, n_frames=8, shape=(64, 64), n_cells=1, min_separation_px=10.0,
                                pixel_size_um=0.5, rng=3)
    with read_image_stack(path) as st:
        table = patterns_table(st, block_frames=3)
    assert len(table) == 8 and table["track_id"].nunique() == 1
    assert (table["mode_order"] == truth["order"].to_numpy()).all()
    np.testing.assert_allclose(table["area_um2"], table["area_px"] * 0.25)
