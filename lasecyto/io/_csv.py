"""Spectral stacks stored as CSV text: wide (one row per frame) or long (one row per value)."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from ..exceptions import InputError

__all__ = ["parse_csv_stack"]

_MEDIUM = re.compile(r"^#\s*medium\s*:\s*(\S+)\s*$", re.IGNORECASE)
_PIXEL = re.compile(r"^px(\d+)$", re.IGNORECASE)
_FRAME_KEYS = ("frame", "time_s")
_RESERVED = _FRAME_KEYS + ("wavelength_nm", "pixel", "counts")
_LAYOUTS = ("wide: first column 'frame' or 'time_s', then one column per wavelength in nm or px0, px1, ...; "
            "long: columns 'frame', 'wavelength_nm' (or 'pixel'), 'counts'")


def _header_comments(path):
    """Leading '#' lines: their count and the medium they declare, if any."""
    n, medium = 0, None
    with open(path, encoding="utf-8-sig") as fh:
        for line in fh:
            if not line.startswith("#"):
                break
            n += 1
            m = _MEDIUM.match(line.strip())
            if m:
                medium = m.group(1).lower()
                if medium not in ("air", "vacuum"):
                    raise InputError("unknown medium in header comment", path=path, field=f"line {n}",
                                     expected="'air' or 'vacuum'", found=repr(m.group(1)))
    return n, medium


def _numbers(cells: pd.Series, path, column, lines):
    """Parse one column of text cells as float64, naming the first cell that is not a number."""
    text = cells.where(cells.map(lambda v: isinstance(v, str)), "").str.strip()
    values = pd.to_numeric(text, errors="coerce")
    bad = values.isna().to_numpy() & ~text.str.lower().eq("nan").to_numpy()
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raw = cells.iloc[i]
        found = repr(raw) if isinstance(raw, str) else "a missing cell"
        raise InputError("non-numeric cell", path=path, field=f"line {lines[i]}, column '{column}'",
                         expected="a number", found=found)
    return values.to_numpy(dtype=np.float64)


def _order(keys, path, column, lines, *, integer):
    """Stable order of unique frame keys; duplicates and non-integers are errors."""
    if integer:
        frac = keys != np.round(keys)
        if frac.any():
            i = int(np.flatnonzero(frac)[0])
            raise InputError("frame number is not an integer", path=path,
                             field=f"line {lines[i]}, column '{column}'", expected="an integer",
                             found=repr(keys[i]))
    order = np.argsort(keys, kind="stable")
    dup = np.flatnonzero(np.diff(keys[order]) == 0)
    if dup.size:
        i = int(order[dup[0] + 1])
        raise InputError("repeated frame", path=path, field=f"line {lines[i]}, column '{column}'",
                         expected="each frame once", found=repr(keys[i]))
    return order


def _wide(body, header, path, lines):
    frame_col = header[0]
    keys = _numbers(body.iloc[:, 0], path, frame_col, lines)
    order = _order(keys, path, frame_col, lines, integer=frame_col == "frame")
    names = header[1:]
    if not names:
        raise InputError("no spectrum columns", path=path, field="header",
                         expected="one column per wavelength or pixel", found="only the frame column")
    pixels = [_PIXEL.match(n) for n in names]
    axis = None
    if all(pixels):
        idx = [int(m.group(1)) for m in pixels]
        if idx != list(range(len(idx))):
            raise InputError("pixel columns out of order", path=path, field="header",
                             expected=f"px0 ... px{len(idx) - 1} in order", found=", ".join(names[:6]))
    else:
        try:
            axis = np.array([float(n) for n in names])
        except ValueError:
            k = next(k for k, n in enumerate(names) if not _is_float(n))
            raise InputError("bad spectrum column name", path=path, field=f"header column {k + 2}",
                             expected="a wavelength in nm (e.g. 612.503) or px<index>",
                             found=repr(names[k])) from None
        d = np.diff(axis)
        if not (np.all(d > 0) or np.all(d < 0)) or not np.all(np.isfinite(axis)):
            raise InputError("wavelength columns not monotonic", path=path, field="header",
                             expected="strictly increasing or decreasing wavelengths",
                             found=f"{names[0]} ... {names[-1]} with a repeat or change of direction")
    counts = np.column_stack([_numbers(body.iloc[:, k + 1], path, n, lines) for k, n in enumerate(names)])
    return counts[order], axis


def _is_float(text):
    try:
        float(text)
    except ValueError:
        return False
    return True


def _long(body, header, path, lines):
    col = {n: k for k, n in enumerate(header)}
    key_name = "wavelength_nm" if "wavelength_nm" in col else "pixel"
    need = ["frame", key_name, "counts"]
    missing = [n for n in need if n not in col]
    extra = [n for n in header if n not in need]
    if missing or extra:
        raise InputError("bad long-layout header", path=path, field="header",
                         expected="columns frame, wavelength_nm (or pixel), counts",
                         found=", ".join(header))
    frames = _numbers(body.iloc[:, col["frame"]], path, "frame", lines)
    keys = _numbers(body.iloc[:, col[key_name]], path, key_name, lines)
    values = _numbers(body.iloc[:, col["counts"]], path, "counts", lines)
    for name, arr in (("frame", frames), (key_name, keys)):
        if name != "wavelength_nm":
            frac = arr != np.round(arr)
            if frac.any():
                i = int(np.flatnonzero(frac)[0])
                raise InputError("index is not an integer", path=path, field=f"line {lines[i]}, column '{name}'",
                                 expected="an integer", found=repr(arr[i]))
    uf, fi = np.unique(frames, return_inverse=True)
    uk, ki = np.unique(keys, return_inverse=True)
    flat = fi * uk.size + ki
    seen = np.zeros(uf.size * uk.size, dtype=np.int64)
    np.add.at(seen, flat, 1)
    if (seen > 1).any():
        cell = int(np.flatnonzero(seen > 1)[0])
        rows = np.flatnonzero(flat == cell)
        raise InputError("repeated value", path=path, field=f"line {lines[rows[1]]}",
                         expected=f"one counts value per frame and {key_name}",
                         found=f"frame {uf[cell // uk.size]:g}, {key_name} {uk[cell % uk.size]:g} again")
    if (seen == 0).any():
        cell = int(np.flatnonzero(seen == 0)[0])
        raise InputError("incomplete long-layout table", path=path, field="counts",
                         expected=f"{uf.size} frames x {uk.size} {key_name} values = {seen.size} rows",
                         found=f"{len(values)} rows (frame {uf[cell // uk.size]:g}, "
                               f"{key_name} {uk[cell % uk.size]:g} absent)")
    if key_name == "pixel" and not np.array_equal(uk, np.arange(uk.size)):
        raise InputError("pixel numbers have gaps", path=path, field="pixel",
                         expected=f"0 ... {uk.size - 1}", found=f"{uk[0]:g} ... {uk[-1]:g}")
    counts = np.empty(seen.size)
    counts[flat] = values
    axis = uk if key_name == "wavelength_nm" else None
    return counts.reshape(uf.size, uk.size), axis


def _column_name(cell):
    name = str(cell).strip()
    return name.lower() if name.lower() in _RESERVED else name


def parse_csv_stack(path):
    """Read a CSV spectral stack.

    Returns
    -------
    counts : ndarray, float64, shape (T, 1, N)
    axis_nm : ndarray or None
        Wavelength of every pixel when the file names them.
    medium : str or None
        From a ``# medium: air|vacuum`` header comment.
    """
    n_comments, medium = _header_comments(path)
    try:
        raw = pd.read_csv(path, header=None, dtype=str, keep_default_na=False, na_filter=False,
                          skiprows=n_comments, skip_blank_lines=False, encoding="utf-8-sig")
    except pd.errors.EmptyDataError:
        raise InputError("empty CSV file", path=path, expected="a header and one row per frame",
                         found="no data") from None
    except (pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise InputError("not a readable CSV file", path=path, found=" ".join(str(exc).split())) from None
    header = [_column_name(h) for h in raw.iloc[0].tolist()]
    body = raw.iloc[1:]
    lines = np.arange(len(body)) + n_comments + 2  # 1-based file line of each body row
    blank = body.apply(lambda r: all((not isinstance(v, str)) or v.strip() == "" for v in r), axis=1)
    keep = ~blank.to_numpy(dtype=bool) if len(body) else np.zeros(0, bool)
    body, lines = body[keep], lines[keep]
    if len(body) == 0:
        raise InputError("CSV stack has no rows", path=path, expected="one or more frames", found="only a header")
    if "counts" in header and ("wavelength_nm" in header or "pixel" in header):
        counts, axis = _long(body, header, path, lines)
    elif header[0] in _FRAME_KEYS:
        counts, axis = _wide(body, header, path, lines)
    else:
        raise InputError("unknown CSV layout", path=path, field="header", expected=_LAYOUTS,
                         found=", ".join(header[:4]) + (", ..." if len(header) > 4 else ""))
    return counts[:, None, :], axis, medium
