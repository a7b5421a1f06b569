"""Lazy access to multi-page TIFF spectral stacks (memory-mapped or page by page)."""

from __future__ import annotations

import math
import os

import numpy as np
import tifffile

from ..exceptions import InputError

__all__ = ["TiffSource"]


def _page_end(page):
    offsets, counts = page.dataoffsets, page.databytecounts
    if not offsets:
        return 0, 0
    i = int(np.argmax([o + c for o, c in zip(offsets, counts)]))
    return offsets[i] + counts[i], sum(counts)


def _declared_pages(tif, series, page_size):
    """Pages the file's own metadata announces (shaped, ImageJ or series shape), and that shape's rank."""
    counts = [math.prod(series.shape) // max(page_size, 1)]
    ndim = len(series.shape)
    if tif.is_shaped and tif.shaped_metadata:
        shape = tif.shaped_metadata[0].get("shape")
        if shape:
            counts.append(math.prod(shape) // max(page_size, 1))
            ndim = len(shape)
    if tif.is_imagej and tif.imagej_metadata:
        images = tif.imagej_metadata.get("images")
        if isinstance(images, int):
            counts.append(images)
            ndim = max(ndim, 3)
    return max(counts), ndim



def try_memmap(path, shape):
    """The first series of a TIFF memory-mapped with ``shape``, or None when it cannot be mapped."""
    try:
        mm = tifffile.memmap(path, mode="r", series=0)
    except (ValueError, OSError):
        return None
    return mm.reshape(shape) if mm.size == math.prod(shape) else None

class TiffSource:
    """Frames of a TIFF stack as a ``(T, R, N)`` view, read lazily.

    The file is memory-mapped when its image data are contiguous and
    uncompressed; otherwise only the pages asked for are decoded.
    """

    def __init__(self, path):
        self.path = path
        size = os.path.getsize(path)
        try:
            self._tif = tifffile.TiffFile(path)
        except Exception as exc:  # tifffile raises TiffFileError, struct.error, ValueError...
            raise InputError("not a readable TIFF file", path=path, expected="a TIFF file",
                             found=" ".join(str(exc).split()) or type(exc).__name__) from None
        try:
            self._open(size)
        except BaseException:
            self._tif.close()
            raise

    def _open(self, size):
        tif, path = self._tif, self.path
        if not tif.series:
            raise InputError("TIFF holds no image", path=path, expected="at least one page", found="none")
        series = tif.series[0]
        key = series.keyframe
        if key.samplesperpixel > 1 or "S" in series.axes:
            raise InputError("colour TIFF cannot be a spectral stack", path=path, field="samples per pixel",
                             expected="1 (grayscale counts)", found=f"{key.samplesperpixel} (RGB/colour samples)")
        if np.dtype(series.dtype).kind not in "uif":
            raise InputError("unsupported pixel type", path=path, field="dtype",
                             expected="unsigned, signed integer or float counts", found=str(series.dtype))
        page_shape = tuple(key.shape)
        if len(page_shape) != 2:
            raise InputError("unsupported page shape", path=path, field="page 0",
                             expected="2-D pages (rows x pixels)", found=f"shape {page_shape}")
        page_size = math.prod(page_shape)
        page_nbytes = page_size * np.dtype(series.dtype).itemsize
        n_declared, ndim = _declared_pages(tif, series, page_size)

        contiguous = series.dataoffset is not None and not key.is_tiled and key.compression == 1
        if contiguous:
            # one block of bytes: check its end without walking the page list
            start = series.dataoffset
            end = start + n_declared * page_nbytes
            if end > size:
                bad = max(0, (size - start) // page_nbytes)
                raise InputError("truncated TIFF", path=path, field=f"page {bad}",
                                 expected=f"{page_nbytes} bytes at byte {start + bad * page_nbytes}",
                                 found=f"file ends at {size} bytes")
        else:
            pages = tif.pages
            pages.useframes = True
            n_found = 0
            for i, page in enumerate(pages):
                n_found += 1
                end, nbytes = _page_end(page)
                if end > size:
                    raise InputError("truncated TIFF", path=path, field=f"page {i}",
                                     expected=f"{nbytes} bytes ending at byte {end}",
                                     found=f"file ends at {size} bytes")
            pages.useframes = False
            if n_found < n_declared:
                raise InputError("truncated TIFF", path=path, field=f"page {n_found}",
                                 expected=f"{n_declared} pages of {page_nbytes} bytes",
                                 found=f"{n_found} pages, file ends at {size} bytes")

        single = n_declared == 1 and ndim <= 2  # one 2-D page (T, N): frames x pixels
        if single:
            self.shape = (page_shape[0], 1, page_shape[1])
        else:
            self.shape = (n_declared, page_shape[0], page_shape[1])
        self.dtype = np.dtype(series.dtype)
        self._single = single
        self._cache = None
        self._pages = None
        self.memmapped = False
        mm = try_memmap(path, self.shape)
        if mm is not None:
            self._data = mm
            self.memmapped = True
        else:
            self._data = None
            self._pages = series.pages if not single else None

    def frames(self, start, stop, r0, r1):
        """Raw values of frames [start, stop), rows [r0, r1): array (n, r1 - r0, N), file dtype."""
        if self._data is not None:
            return self._data[start:stop, r0:r1, :]
        if self._single:
            if self._cache is None:
                self._cache = self._tif.pages[0].asarray().reshape(self.shape)
            return self._cache[start:stop, r0:r1, :]
        out = np.empty((stop - start, r1 - r0, self.shape[2]), dtype=self.dtype)
        for k, i in enumerate(range(start, stop)):
            page = self._pages[i]
            if page is None:
                raise InputError("missing TIFF page", path=self.path, field=f"page {i}",
                                 expected="a readable page", found="none")
            out[k] = page.asarray().reshape(self.shape[1:])[r0:r1]
        return out

    def close(self):
        self._data = None
        self._cache = None
        self._pages = None
        self._tif.close()
