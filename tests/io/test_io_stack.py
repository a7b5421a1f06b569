"""Spectral stack readers: TIFF (memory-mapped and page by page), CSV wide/long, NPZ."""

import numpy as np
import pytest
import tifffile

from lasecyto.exceptions import InputError
from lasecyto.io import read_stack


def _counts(shape, seed):
    rng = np.random.default_rng(seed)
    return rng.integers(90, 4000, size=shape).astype(np.uint16)


def _one_line(err):
    text = str(err.value)
    assert "\n" not in text
    return text


def test_tiff_1d_stack_round_trip_memmapped(tmp_path):
    data = _counts((12, 1, 64), 1)
    path = tmp_path / "s.tif"
    tifffile.imwrite(path, data)
    with read_stack(path) as st:
        assert (st.n_frames, st.n_rows, st.n_pixels) == (12, 1, 64)
        assert st.memmapped and st.format == "tiff"
        assert st.axis_nm is None and st.axis_medium is None
        out = st.read()
        assert out.dtype == np.float64 and out.shape == (12, 64)
        np.testing.assert_array_equal(out, data[:, 0, :])
        np.testing.assert_array_equal(st.read(3, 7), data[3:7, 0, :])
        assert st.read_rows(2, 4).shape == (2, 1, 64)


def test_tiff_2d_rows_summed(tmp_path):
    data = np.random.default_rng(2).normal(500, 20, size=(9, 6, 40)).astype(np.float32)
    path = tmp_path / "img.tiff"
    tifffile.imwrite(path, data)
    with read_stack(path) as st:
        assert (st.n_frames, st.n_rows, st.n_pixels) == (9, 6, 40)
        np.testing.assert_allclose(st.read(rows=(1, 4)), data[:, 1:4, :].astype(np.float64).sum(axis=1))
        np.testing.assert_allclose(st.read(2, 5), data[2:5].astype(np.float64).sum(axis=1))
        np.testing.assert_array_equal(st.read_rows(), data.astype(np.float64))


def test_tiff_single_page_is_frames_by_pixels(tmp_path):
    data = _counts((15, 32), 3)
    path = tmp_path / "page.tif"
    tifffile.imwrite(path, data)
    with read_stack(path) as st:
        assert (st.n_frames, st.n_rows, st.n_pixels) == (15, 1, 32)
        np.testing.assert_array_equal(st.read(), data)


@pytest.mark.parametrize("shape", [(11, 1, 48), (7, 3, 20), (13, 48)])
def test_compressed_tiff_uses_page_reader(tmp_path, shape):
    data = _counts(shape, 4)
    path = tmp_path / "z.tif"
    tifffile.imwrite(path, data, compression="zlib")
    with read_stack(path) as st:
        assert not st.memmapped
        full = data if data.ndim == 3 else data[:, None, :]
        assert (st.n_frames, st.n_rows, st.n_pixels) == full.shape
        np.testing.assert_array_equal(st.read(2, 5), full[2:5].sum(axis=1))
        np.testing.assert_array_equal(st.read_rows(), full)


def test_iter_blocks_covers_every_frame_once(tmp_path):
    data = _counts((23, 4, 16), 5)
    path = tmp_path / "b.tif"
    tifffile.imwrite(path, data)
    with read_stack(path) as st:
        starts, blocks = zip(*st.iter_blocks(block_frames=5, rows=(1, 3)))
    assert starts == (0, 5, 10, 15, 20)
    assert [b.shape[0] for b in blocks] == [5, 5, 5, 5, 3]
    np.testing.assert_array_equal(np.concatenate(blocks), data[:, 1:3, :].sum(axis=1))


@pytest.mark.parametrize("compression", [None, "zlib"])
def test_truncated_tiff_names_file_and_page(tmp_path, compression):
    data = _counts((40, 1, 300), 6)
    path = tmp_path / "cut.tif"
    tifffile.imwrite(path, data, compression=compression)
    size = path.stat().st_size
    with open(path, "r+b") as fh:
        fh.truncate(int(size * 0.6))
    with pytest.raises(InputError) as err:
        read_stack(path)
    text = _one_line(err)
    assert "cut.tif" in text and "page " in text and "file ends at" in text
    assert err.value.field.startswith("page ")


def test_rgb_tiff_is_refused(tmp_path):
    path = tmp_path / "rgb.tif"
    tifffile.imwrite(path, np.zeros((4, 8, 30, 3), np.uint8), photometric="rgb")
    with pytest.raises(InputError, match="samples per pixel") as err:
        read_stack(path)
    assert "rgb.tif" in _one_line(err)


def test_bad_ranges_and_closed_stack(tmp_path):
    path = tmp_path / "r.tif"
    tifffile.imwrite(path, _counts((5, 2, 10), 7))
    st = read_stack(path)
    with pytest.raises(InputError, match="frame range"):
        st.read(3, 9)
    with pytest.raises(InputError, match="frame range"):
        st.read(-1, 2)
    with pytest.raises(InputError, match="detector rows"):
        st.read(rows=(1, 3))
    with pytest.raises(InputError, match="detector rows"):
        st.read(rows=(1, 1))
    with pytest.raises(InputError, match="block_frames"):
        list(st.iter_blocks(block_frames=0))
    assert st.read(2, 2).shape == (0, 10)
    st.close()
    st.close()
    with pytest.raises(InputError, match="closed"):
        st.read()


def test_unknown_suffix_lists_formats(tmp_path):
    path = tmp_path / "x.dat"
    path.write_text("1,2,3\n")
    with pytest.raises(InputError) as err:
        read_stack(path)
    text = _one_line(err)
    assert "format=" in text and ".tif" in text and ".csv" in text and ".npz" in text


def test_format_keyword_overrides_suffix(tmp_path):
    path = tmp_path / "x.dat"
    path.write_text("frame,px0,px1\n0,1,2\n1,3,4\n")
    with read_stack(path, format="csv") as st:
        np.testing.assert_array_equal(st.read(), [[1, 2], [3, 4]])
    with pytest.raises(InputError, match="format"):
        read_stack(path, format="fits")


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="not found"):
        read_stack(tmp_path / "none.tif")


def test_csv_wide_with_wavelength_header(tmp_path):
    axis = np.round(np.linspace(612.5, 618.0, 12), 3)
    data = np.random.default_rng(8).normal(100, 5, size=(6, 12)).round(2)
    path = tmp_path / "w.csv"
    lines = ["# medium: vacuum", "frame," + ",".join(f"{x:.3f}" for x in axis)]
    order = [3, 0, 5, 1, 4, 2]  # rows out of order: the frame column decides
    lines += [f"{i}," + ",".join(repr(float(v)) for v in data[i]) for i in order]
    path.write_text("\n".join(lines) + "\n")
    with read_stack(path) as st:
        assert (st.n_frames, st.n_rows, st.n_pixels) == (6, 1, 12)
        assert st.axis_medium == "vacuum"
        np.testing.assert_allclose(st.axis_nm, axis, rtol=0, atol=1e-12)
        np.testing.assert_array_equal(st.read(), data)


def test_csv_wide_with_pixel_header_and_time_column(tmp_path):
    path = tmp_path / "p.csv"
    path.write_text("time_s,px0,px1,px2\n0.0,1,2,3\n\n10.0,4,5,6\n")
    with read_stack(path) as st:
        assert st.axis_nm is None and st.axis_medium is None
        np.testing.assert_array_equal(st.read(), [[1, 2, 3], [4, 5, 6]])


def test_csv_long_layout(tmp_path):
    rng = np.random.default_rng(9)
    axis = np.linspace(600.0, 601.0, 5)
    data = rng.normal(50, 3, size=(4, 5))
    rows = [(f, axis[k], data[f, k]) for f in range(4) for k in range(5)]
    order = rng.permutation(len(rows))
    text = "frame,wavelength_nm,counts\n" + "".join(f"{rows[i][0]},{float(rows[i][1])!r},{float(rows[i][2])!r}\n" for i in order)
    path = tmp_path / "long.csv"
    path.write_text("# medium: air\n" + text)
    with read_stack(path) as st:
        assert (st.n_frames, st.n_pixels) == (4, 5) and st.axis_medium == "air"
        np.testing.assert_array_equal(st.axis_nm, axis)
        np.testing.assert_array_equal(st.read(), data)


def test_csv_long_with_pixels_and_a_missing_value(tmp_path):
    path = tmp_path / "lp.csv"
    path.write_text("frame,pixel,counts\n0,0,1\n0,1,2\n1,0,3\n1,1,4\n")
    with read_stack(path) as st:
        assert st.axis_nm is None
        np.testing.assert_array_equal(st.read(), [[1, 2], [3, 4]])
    path.write_text("frame,pixel,counts\n0,0,1\n0,1,2\n1,0,3\n")
    with pytest.raises(InputError, match="incomplete"):
        read_stack(path)


def test_csv_non_numeric_cell_names_line_and_column(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text("# medium: air\nframe,612.5,612.6\n0,1,2\n1,abc,4\n")
    with pytest.raises(InputError) as err:
        read_stack(path)
    text = _one_line(err)
    assert "bad.csv" in text
    assert "line 4" in text and "column '612.5'" in text
    assert "expected a number" in text and "found 'abc'" in text


def test_csv_unknown_layout(tmp_path):
    path = tmp_path / "u.csv"
    path.write_text("a,b\n1,2\n")
    with pytest.raises(InputError, match="unknown CSV layout"):
        read_stack(path)


def test_npz_round_trip(tmp_path):
    data = _counts((8, 3, 25), 10).astype(np.float32)
    axis = np.linspace(610, 620, 25)
    path = tmp_path / "s.npz"
    np.savez(path, counts=data, wavelength_nm=axis, medium=np.array("vacuum"))
    with read_stack(path) as st:
        assert (st.n_frames, st.n_rows, st.n_pixels) == (8, 3, 25)
        assert st.axis_medium == "vacuum"
        np.testing.assert_array_equal(st.axis_nm, axis)
        np.testing.assert_array_equal(st.read(rows=(0, 2)), data[:, :2].astype(np.float64).sum(axis=1))
    np.savez(path, counts=data[:, 0, :])
    with read_stack(path) as st:
        assert st.n_rows == 1 and st.axis_nm is None and st.axis_medium is None
        np.testing.assert_array_equal(st.read(), data[:, 0, :])


def test_npz_bad_axis_length(tmp_path):
    path = tmp_path / "b.npz"
    np.savez(path, counts=np.zeros((3, 10)), wavelength_nm=np.zeros(9))
    with pytest.raises(InputError, match="wavelength_nm"):
        read_stack(path)


@pytest.mark.parametrize("shape, kwargs", [
    ((3, 1, 20), {"photometric": "minisblack"}),   # 3 frames must not be taken for colour planes
    ((1, 5, 20), {}),                                # one frame of 5 rows: the shape metadata decides
    ((4, 32, 48), {"photometric": "minisblack", "tile": (16, 16)}),  # tiled: page reader
])
def test_tiff_shape_edge_cases(tmp_path, shape, kwargs):
    data = _counts(shape, 11)
    path = tmp_path / "e.tif"
    tifffile.imwrite(path, data, **kwargs)
    with read_stack(path) as st:
        assert (st.n_frames, st.n_rows, st.n_pixels) == shape
        assert st.memmapped == ("tile" not in kwargs)
        np.testing.assert_array_equal(st.read_rows(), data)
        np.testing.assert_array_equal(st.read(0, 1, rows=(0, 1)), data[:1, 0, :])
