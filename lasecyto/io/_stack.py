"""Spectral stacks: one spectrum (or one detector image of rows x pixels) per frame, read lazily."""

from __future__ import annotations

import numbers
import zipfile
from pathlib import Path

import numpy as np

from ..exceptions import InputError
from ._csv import parse_csv_stack
from ._tiff import TiffSource

__all__ = ["SpectralStack", "read_stack", "FORMATS"]

FORMATS = {"tiff": (".tif", ".tiff"), "csv": (".csv",), "npz": (".npz",)}


class _ArraySource:
    """Frames held in memory (CSV and NPZ stacks are small)."""

    memmapped = False

    def __init__(self, data):
        self._data = data
        self.shape = data.shape
        self.dtype = data.dtype

    def frames(self, start, stop, r0, r1):
        return self._data[start:stop, r0:r1, :]

    def close(self):
        self._data = None


def _load_npz(path):
    try:
        npz = np.load(path, mmap_mode=None, allow_pickle=False)
    except (ValueError, OSError, zipfile.BadZipFile) as exc:
        raise InputError("not a readable NPZ file", path=path, found=" ".join(str(exc).split())) from None
    if not isinstance(npz, np.lib.npyio.NpzFile):
        raise InputError("not an NPZ archive", path=path, expected="a .npz archive of named arrays",
                         found="a single .npy array")
    with npz:
        names = set(npz.files)
        if "counts" not in names:
            raise InputError("missing array", path=path, field="counts",
                             expected="an array (T, N) or (T, R, N)", found=f"arrays {sorted(names)}")
        try:
            counts = npz["counts"]
            axis = npz["wavelength_nm"] if "wavelength_nm" in names else None
            medium = npz["medium"] if "medium" in names else None
        except ValueError as exc:  # object arrays need pickle, which is refused
            raise InputError("unreadable array", path=path, expected="numeric arrays without pickled objects",
                             found=" ".join(str(exc).split())) from None
    if counts.dtype.kind not in "uif" or counts.ndim not in (2, 3):
        raise InputError("bad counts array", path=path, field="counts",
                         expected="a real numeric array (T, N) or (T, R, N)",
                         found=f"{counts.dtype} array of shape {counts.shape}")
    if counts.ndim == 2:
        counts = counts[:, None, :]
    if axis is not None:
        axis = np.asarray(axis)
        if axis.dtype.kind not in "uif" or axis.shape != (counts.shape[2],):
            raise InputError("bad wavelength array", path=path, field="wavelength_nm",
                             expected=f"{counts.shape[2]} numbers (one per pixel)",
                             found=f"{axis.dtype} array of shape {axis.shape}")
        axis = axis.astype(np.float64)
    if medium is not None:
        if medium.ndim != 0 or medium.dtype.kind != "U" or str(medium) not in ("air", "vacuum"):
            raise InputError("bad medium", path=path, field="medium",
                             expected="a 0-d string array 'air' or 'vacuum'",
                             found=repr(medium.tolist()) if medium.size < 5 else f"shape {medium.shape}")
        medium = str(medium)
    return counts, axis, medium


def _guess_format(path):
    name = path.name.lower()
    for fmt, suffixes in FORMATS.items():
        if name.endswith(suffixes):
            return fmt
    raise InputError("unknown stack format", path=path, field="suffix",
                     expected="one of .tif, .tiff (tiff), .csv (csv), .npz (npz); "
                              "or pass format='tiff', 'csv' or 'npz'",
                     found=repr(path.suffix))


def _check_int(value, name):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral):
        raise InputError("not an integer", field=name, expected="an integer", found=repr(value))
    return int(value)


class SpectralStack:
    """A lazily read spectral stack; use :func:`read_stack` to open one.

    Attributes
    ----------
    path : pathlib.Path
    format : str
        ``"tiff"``, ``"csv"`` or ``"npz"``.
    n_frames, n_rows, n_pixels : int
        Frames, detector rows (1 for 1-D spectra) and wavelength pixels.
    axis_nm : ndarray or None
        Wavelength of every pixel when the file carries one (CSV, NPZ).
    axis_medium : str or None
        ``"air"`` or ``"vacuum"`` when the file says so.
    memmapped : bool
        True when a TIFF is served from a memory map.

    The stack is a context manager; leaving the block closes the file.
    """

    def __init__(self, path, fmt, source, *, axis_nm=None, axis_medium=None):
        self.path = Path(path)
        self.format = fmt
        self._source = source
        self.n_frames, self.n_rows, self.n_pixels = (int(n) for n in source.shape)
        self.axis_nm = axis_nm
        if axis_nm is not None:
            self.axis_nm.setflags(write=False)
        self.axis_medium = axis_medium
        self.dtype = source.dtype
        self.memmapped = bool(source.memmapped)

    def __repr__(self):
        state = "closed" if self._source is None else self.format
        return (f"SpectralStack({self.path.name!r}, {state}, n_frames={self.n_frames}, "
                f"n_rows={self.n_rows}, n_pixels={self.n_pixels})")

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def close(self):
        """Release the file (a second call does nothing)."""
        if self._source is not None:
            self._source.close()
            self._source = None

    def _frame_range(self, start, stop):
        if self._source is None:
            raise InputError("stack is closed", path=self.path, expected="an open stack",
                             found="read after close()")
        start = _check_int(start, "start")
        stop = self.n_frames if stop is None else _check_int(stop, "stop")
        if not 0 <= start <= stop <= self.n_frames:
            raise InputError("frame range outside the stack", path=self.path, field="start, stop",
                             expected=f"0 <= start <= stop <= {self.n_frames}", found=f"[{start}, {stop})")
        return start, stop

    def _row_range(self, rows):
        if rows is None:
            return 0, self.n_rows
        try:
            r0, r1 = rows
        except (TypeError, ValueError):
            raise InputError("bad detector row range", path=self.path, field="rows",
                             expected="(start, stop)", found=repr(rows)) from None
        r0, r1 = _check_int(r0, "rows[0]"), _check_int(r1, "rows[1]")
        if not 0 <= r0 < r1 <= self.n_rows:
            raise InputError("detector rows outside the stack", path=self.path, field="rows",
                             expected=f"0 <= start < stop <= {self.n_rows}", found=f"[{r0}, {r1})")
        return r0, r1

    def read(self, start=0, stop=None, *, rows=None) -> np.ndarray:
        """Frames [start, stop) as float64 ``(stop - start, n_pixels)``, detector rows summed.

        Parameters
        ----------
        start, stop : int
            Frame range; ``stop=None`` reads to the end.
        rows : (int, int), optional
            Detector rows [rows[0], rows[1]) to sum; all rows when None.
        """
        start, stop = self._frame_range(start, stop)
        r0, r1 = self._row_range(rows)
        raw = self._source.frames(start, stop, r0, r1)
        return raw.sum(axis=1, dtype=np.float64)

    def read_rows(self, start=0, stop=None) -> np.ndarray:
        """Frames [start, stop) as float64 ``(stop - start, n_rows, n_pixels)``, rows kept apart."""
        start, stop = self._frame_range(start, stop)
        return np.array(self._source.frames(start, stop, 0, self.n_rows), dtype=np.float64)

    def iter_blocks(self, *, block_frames=256, rows=None):
        """Yield ``(start, block)`` over consecutive frame blocks, each block as from :meth:`read`."""
        block_frames = _check_int(block_frames, "block_frames")
        if block_frames < 1:
            raise InputError("block size must be positive", path=self.path, field="block_frames",
                             expected=">= 1", found=str(block_frames))
        self._row_range(rows)
        for start in range(0, self.n_frames, block_frames):
            yield start, self.read(start, min(start + block_frames, self.n_frames), rows=rows)


def read_stack(path, *, format=None) -> SpectralStack:  # noqa: A002 - the documented keyword
    """Open a spectral stack (TIFF, CSV or NPZ) for lazy reading.

    Parameters
    ----------
    path : str or os.PathLike
    format : {"tiff", "csv", "npz"}, optional
        File format; by default chosen from the suffix.

    Returns
    -------
    SpectralStack

    Raises
    ------
    InputError
        Missing, truncated or malformed file, unknown format, colour TIFF.
    """
    path = Path(path)
    if format is None:
        fmt = _guess_format(path)
    elif format in FORMATS:
        fmt = format
    else:
        raise InputError("unknown stack format", path=path, field="format",
                         expected="'tiff', 'csv' or 'npz'", found=repr(format))
    if not path.is_file():
        raise InputError("stack file not found", path=path, expected="an existing file", found="nothing")
    if fmt == "tiff":
        return SpectralStack(path, fmt, TiffSource(path))
    if fmt == "csv":
        counts, axis, medium = parse_csv_stack(path)
    else:
        counts, axis, medium = _load_npz(path)
    return SpectralStack(path, fmt, _ArraySource(counts), axis_nm=axis, axis_medium=medium)
