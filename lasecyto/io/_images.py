"""Camera image stacks (frames, rows, cols) from TIFF and OME-TIFF, read lazily."""

from __future__ import annotations

import json
import math
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import tifffile

from ..exceptions import InputError
from ._tiff import try_memmap

__all__ = ["ImageStack", "read_image_stack"]

_TIME_UNITS_S = {"s": 1.0, "ms": 1e-3, "\u00b5s": 1e-6, "us": 1e-6, "min": 60.0, "h": 3600.0}
_LENGTH_UNITS_UM = {"\u00b5m": 1.0, "um": 1.0, "nm": 1e-3, "mm": 1e3, "m": 1e6}


def _ome_metadata(xml_text):
    """Time increment (s), pixel size (um) and per-plane DeltaT (s) from an OME-XML header."""
    out = {"frame_interval_s": None, "pixel_size_um": None, "delta_t_s": None}
    try:
        root = ET.fromstring(xml_text)
    except ET.ParseError:
        return out
    pixels = next((el for el in root.iter() if el.tag.endswith("}Pixels") or el.tag == "Pixels"), None)
    if pixels is None:
        return out
    ti = pixels.get("TimeIncrement")
    if ti is not None:
        scale = _TIME_UNITS_S.get(pixels.get("TimeIncrementUnit", "s"))
        if scale is not None:
            out["frame_interval_s"] = float(ti) * scale
    px = pixels.get("PhysicalSizeX")
    if px is not None:
        scale = _LENGTH_UNITS_UM.get(pixels.get("PhysicalSizeXUnit", "\u00b5m"))
        if scale is not None:
            out["pixel_size_um"] = float(px) * scale
    planes = [el for el in pixels if el.tag.endswith("}Plane") or el.tag == "Plane"]
    dts = []
    for pl in planes:
        dt = pl.get("DeltaT")
        if dt is None:
            dts = []
            break
        scale = _TIME_UNITS_S.get(pl.get("DeltaTUnit", "s"), 1.0)
        dts.append((int(pl.get("TheT", len(dts))), float(dt) * scale))
    if dts:
        out["delta_t_s"] = np.array([d for _, d in sorted(dts)])
    return out


def _read_image_sidecar(path):
    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError("sidecar not found", path=path, expected="an existing JSON file", found="nothing") from None
    except json.JSONDecodeError as exc:
        raise InputError(f"invalid JSON: {exc.msg}", path=path, field=f"line {exc.lineno}, column {exc.colno}",
                         expected="valid JSON") from None
    if not isinstance(doc, dict):
        raise InputError("sidecar is not an object", path=path, expected="a JSON object", found=type(doc).__name__)
    return doc


class ImageStack:
    """A grayscale camera stack ``(frames, rows, cols)`` read lazily from a TIFF file.

    Slicing along frames (``stack[a:b]``) returns a numpy array of those
    frames only.  Contiguous uncompressed data are read block by block with
    plain file reads (resident memory stays at one block), or through a
    memory map with ``memmap=True`` (fast random access; the pages touched
    stay resident until the stack is closed); other files page by page.  ``blocks(n)`` yields
    ``(start, frames)`` in blocks of ``n`` frames.

    Attributes
    ----------
    path : pathlib.Path
    shape : (int, int, int)
    dtype : numpy.dtype
    time_s : numpy.ndarray
        Frame times (sidecar ``frame_times_s``, else OME DeltaT, else frame x interval).
    frame_interval_s : float or None
    pixel_size_um : float or None
    memmapped : bool
        True when frames come from a memory map.
    """

    def __init__(self, path, *, sidecar=None, memmap=False):
        self.path = Path(path)
        self._memmap = bool(memmap)
        try:
            self._tif = tifffile.TiffFile(self.path)
        except FileNotFoundError:
            raise InputError("image stack not found", path=self.path, expected="an existing TIFF file",
                             found="nothing") from None
        except Exception as exc:  # tifffile raises TiffFileError, struct.error, ValueError...
            raise InputError("not a readable TIFF file", path=self.path, expected="a TIFF file",
                             found=" ".join(str(exc).split()) or type(exc).__name__) from None
        self._fh = None
        try:
            self._open(sidecar)
        except BaseException:
            self.close()
            raise

    def _open(self, sidecar):
        tif, path = self._tif, self.path
        if not tif.series or not len(tif.pages):
            raise InputError("TIFF holds no image", path=path, expected="at least one page", found="none")
        series = tif.series[0]
        key = series.keyframe
        if key.samplesperpixel > 1 or "S" in series.axes:
            raise InputError("colour image where grayscale frames are expected", path=path,
                             field="samples per pixel", expected="1 (grayscale)",
                             found=f"{key.samplesperpixel} (RGB/colour samples, axes {series.axes})")
        if np.dtype(series.dtype).kind not in "uif":
            raise InputError("unsupported pixel type", path=path, field="dtype",
                             expected="unsigned, signed integer or float counts", found=str(series.dtype))
        page_shape = tuple(key.shape)
        if len(page_shape) != 2 or 0 in page_shape:
            raise InputError("empty or non-2-D frame", path=path, field="page 0",
                             expected="2-D pages (rows x cols) of at least one pixel", found=f"shape {page_shape}")
        n = math.prod(series.shape) // math.prod(page_shape)
        self.shape = (int(n), int(page_shape[0]), int(page_shape[1]))
        self.dtype = np.dtype(series.dtype)
        self._pages = series.pages
        self.memmapped = False
        self._data = None
        self._offset = None
        self._fh = None
        contiguous = series.dataoffset is not None and not key.is_tiled and key.compression == 1
        if contiguous:
            need = series.dataoffset + n * math.prod(page_shape) * self.dtype.itemsize
            size = path.stat().st_size
            if need > size:
                raise InputError("truncated TIFF", path=path, expected=f"{need} bytes of image data",
                                 found=f"file ends at {size} bytes")
            if self._memmap:
                mm = try_memmap(path, self.shape)
                if mm is not None:
                    self._data = mm
                    self.memmapped = True
            else:
                self._offset = int(series.dataoffset)
                self._file_dtype = self.dtype.newbyteorder(tif.byteorder)
                self._fh = open(path, "rb")  # noqa: SIM115 - closed by close()
        meta = {"frame_interval_s": None, "pixel_size_um": None, "delta_t_s": None}
        if tif.is_ome and tif.ome_metadata:
            meta = _ome_metadata(tif.ome_metadata)
        elif tif.is_imagej and tif.imagej_metadata:
            ij = tif.imagej_metadata
            if ij.get("finterval"):
                meta["frame_interval_s"] = float(ij["finterval"])
            xres = key.tags.get("XResolution")
            if xres is not None and ij.get("unit") in ("micron", "um", "\u00b5m"):
                num, den = xres.value
                if num:
                    meta["pixel_size_um"] = den / num
        self.frame_interval_s = meta["frame_interval_s"]
        self.pixel_size_um = meta["pixel_size_um"]
        times = None
        if meta["delta_t_s"] is not None and len(meta["delta_t_s"]) == n:
            times = meta["delta_t_s"] - meta["delta_t_s"][0]
        self.sidecar_path = None
        if sidecar is not None:
            self.sidecar_path = Path(sidecar)
            doc = _read_image_sidecar(sidecar)
            if "frame_times_s" in doc:
                ft = doc["frame_times_s"]
                if not isinstance(ft, list) or not all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                                       for v in ft):
                    raise InputError("bad frame times", path=sidecar, field="frame_times_s",
                                     expected="a list of numbers", found=type(ft).__name__)
                if len(ft) != n:
                    raise InputError("frame count of the stack disagrees with its sidecar", path=sidecar,
                                     field="frame_times_s", expected=f"{n} values (one per frame of {path.name})",
                                     found=f"{len(ft)} values")
                times = np.asarray(ft, dtype=float)
                if n > 1 and (np.diff(times) <= 0).any():
                    raise InputError("frame times not strictly increasing", path=sidecar, field="frame_times_s",
                                     expected="increasing times", found="a non-increasing step")
            if "n_frames" in doc and doc["n_frames"] != n:
                raise InputError("frame count of the stack disagrees with its sidecar", path=sidecar,
                                 field="n_frames", expected=f"{n} (frames in {path.name})",
                                 found=repr(doc["n_frames"]))
            if doc.get("pixel_size_um") is not None:
                v = doc["pixel_size_um"]
                if not isinstance(v, (int, float)) or isinstance(v, bool) or not v > 0:
                    raise InputError("bad pixel size", path=sidecar, field="pixel_size_um",
                                     expected="a number > 0", found=repr(v))
                self.pixel_size_um = float(v)
        if times is None:
            times = np.arange(n) * (self.frame_interval_s if self.frame_interval_s else 1.0)
        if self.frame_interval_s is None and n > 1:
            self.frame_interval_s = float(np.median(np.diff(times)))
        times = np.asarray(times, dtype=float)
        times.setflags(write=False)
        self.time_s = times

    @property
    def ndim(self):
        return 3

    @property
    def n_frames(self):
        return self.shape[0]

    def __len__(self):
        return self.shape[0]

    def __getitem__(self, key):
        if isinstance(key, (int, np.integer)):
            i = int(key) + (self.shape[0] if key < 0 else 0)
            return self[i:i + 1][0]
        if not isinstance(key, slice):
            raise InputError("unsupported index", field="stack", expected="an integer or a slice of frames",
                             found=type(key).__name__)
        start, stop, step = key.indices(self.shape[0])
        if self._data is not None:
            return np.array(self._data[start:stop:step])
        if self._fh is not None and step == 1:
            n_px = self.shape[1] * self.shape[2]
            count = max(stop - start, 0)
            self._fh.seek(self._offset + start * n_px * self.dtype.itemsize)
            raw = np.fromfile(self._fh, dtype=self._file_dtype, count=count * n_px)
            return raw.astype(self.dtype, copy=False).reshape(count, *self.shape[1:])
        idx = range(start, stop, step)
        out = np.empty((len(idx), *self.shape[1:]), dtype=self.dtype)
        for k, i in enumerate(idx):
            out[k] = self._pages[i].asarray().reshape(self.shape[1:])
        return out

    def blocks(self, block_frames=64):
        """Yield ``(start, frames)`` blocks of at most ``block_frames`` frames."""
        for start in range(0, self.shape[0], int(block_frames)):
            yield start, self[start:start + int(block_frames)]

    def close(self):
        """Release the file (and memory map)."""
        self._data = None
        if getattr(self, "_fh", None) is not None:
            self._fh.close()
            self._fh = None
        self._tif.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def read_image_stack(path, *, sidecar="auto", memmap=False):
    """Open a TIFF / OME-TIFF camera stack lazily.

    Parameters
    ----------
    path : str or os.PathLike
        The stack.
    sidecar : str, os.PathLike, None or "auto"
        JSON sidecar with ``frame_times_s`` (and optionally ``n_frames``,
        ``pixel_size_um``); ``"auto"`` uses ``path.with_suffix('.json')`` when
        it exists, None uses none.
    memmap : bool
        Memory-map contiguous data instead of reading blocks (see :class:`ImageStack`).

    Returns
    -------
    ImageStack

    Raises
    ------
    InputError
        Unreadable file, colour (RGB) pages, empty pages, a truncated file, or
        a sidecar whose frame count disagrees with the stack.
    """
    path = Path(path)
    if isinstance(sidecar, str) and sidecar == "auto":
        cand = path.with_suffix(".json")
        sidecar = cand if cand.exists() else None
    return ImageStack(path, sidecar=sidecar, memmap=memmap)
