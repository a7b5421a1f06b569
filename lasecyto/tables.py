"""Schemas of the tidy tables passed between stages.

Each table is long and tidy (one row per observation, a plain RangeIndex) and
carries its units in its column names (``_nm``, ``_px``, ``_s``, ``_um``,
``_counts``).  Wavelengths are vacuum wavelengths.  A table may carry extra
columns; the columns listed here must be present with the stated kind.

:func:`validate` is called by every writer and reader in :mod:`lasecyto.io`
and may be called by any stage on its inputs.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .exceptions import SchemaError

__all__ = ["Column", "SCHEMAS", "validate", "empty", "describe"]


@dataclass(frozen=True)
class Column:
    name: str
    kind: str  # "int", "float", "bool", "str"
    unit: str  # "" for dimensionless
    description: str
    default: object = None  # a column with a default is filled with it when absent (added later)


def _c(name, kind, unit, description, default=None):
    return Column(name, kind, unit, description, default)


_LINES = (
    _c("cell_id", "str", "", "cell identifier from the manifest"),
    _c("frame", "int", "", "frame index in the acquisition, from 0"),
    _c("time_s", "float", "s", "frame time from the start of the acquisition"),
    _c("line_id", "int", "", "line index within the cell and frame, by increasing wavelength"),
    _c("center_px", "float", "px", "fitted line centre on the detector (pixel centres are integers)"),
    _c("center_err_px", "float", "px", "1-sigma centre uncertainty from the Fisher information"),
    _c("center_nm", "float", "nm", "fitted line centre, vacuum wavelength"),
    _c("center_err_nm", "float", "nm", "1-sigma centre uncertainty"),
    _c("fwhm_px", "float", "px", "fitted full width at half maximum"),
    _c("fwhm_nm", "float", "nm", "fitted full width at half maximum"),
    _c("area_counts", "float", "counts", "integrated line signal above background"),
    _c("area_err_counts", "float", "counts", "1-sigma uncertainty of the area"),
    _c("amplitude_counts", "float", "counts", "peak line signal above background in the brightest pixel"),
    _c("background_counts", "float", "counts", "background per pixel under the line centre (offset removed)"),
    _c("snr", "float", "", "area divided by its uncertainty"),
    _c("chi2_red", "float", "", "reduced chi-square of the fit window under the noise model"),
    _c("lasing", "bool", "", "line judged a laser line (rule in DEVELOPERS.md)"),
    _c("saturated", "bool", "", "a pixel of the fit window reached the saturation level"),
    _c("fit_ok", "bool", "", "the fit converged to a physical solution"),
    _c("fit_message", "str", "", "empty when fit_ok, else the reason"),
    _c("cosmic_ray", "bool", "", "narrower than the instrument function and in one frame only (never lasing)",
       default=False),
    _c("contrast", "float", "", "peak line signal over the background under it", default=float("nan")),
)

_TRACKS = _LINES + (
    _c("track_id", "int", "", "mode track within the cell, from 0"),
    _c("mode_family", "int", "", "comb family of the track: 0 is the family carrying most power"),
)

_CELL_FRAMES = (
    _c("cell_id", "str", "", "cell identifier"),
    _c("frame", "int", "", "frame index"),
    _c("time_s", "float", "s", "frame time"),
    _c("n_lines", "int", "", "lines fitted in this frame"),
    _c("n_lasing", "int", "", "lines judged lasing"),
    _c("total_area_counts", "float", "counts", "summed area of the lasing lines"),
    _c("lasing", "bool", "", "at least one lasing line in the frame"),
    _c("fsr_nm", "float", "nm", "free spectral range of the main comb family at its centre"),
    _c("optical_length_um", "float", "um", "group optical length n_g L from the comb spacing"),
    _c("optical_length_err_um", "float", "um", "1-sigma uncertainty"),
    _c("relative_shift", "float", "", "weighted mean of (lambda - lambda_baseline)/lambda_baseline over tracks"),
    _c("relative_shift_err", "float", "", "1-sigma uncertainty"),
    _c("delta_optical_length_um", "float", "um", "change of the phase optical length n L since baseline"),
    _c("delta_optical_length_err_um", "float", "um", "1-sigma uncertainty"),
    _c("index_change", "float", "", "change of the gap's refractive index since baseline (needs gap_um)"),
    _c("index_change_err", "float", "", "1-sigma uncertainty"),
)

_CELLS = (
    _c("cell_id", "str", "", "cell identifier"),
    _c("dish", "str", "", "dish (or well) of the cell"),
    _c("condition", "str", "", "experimental condition of the dish"),
    _c("perturbation_s", "float", "s", "time of the perturbation (NaN when none)"),
    _c("n_frames", "int", "", "frames in the acquisition"),
    _c("n_frames_lasing", "int", "", "frames with at least one lasing line"),
    _c("n_tracks", "int", "", "mode tracks found"),
    _c("baseline_optical_length_um", "float", "um", "median group optical length before the perturbation"),
    _c("baseline_noise", "float", "", "frame-to-frame scatter of index_change (or relative_shift) before the perturbation"),
    _c("index_change", "float", "", "mean change after the response settled, relative to baseline"),
    _c("index_change_err", "float", "", "1-sigma uncertainty of index_change"),
    _c("change_z", "float", "", "index_change divided by baseline_noise"),
    _c("onset_s", "float", "s", "time the change began (NaN when no change)"),
    _c("onset_err_s", "float", "s", "uncertainty of onset_s"),
    _c("changed", "bool", "", "the cell changed state (rule in DEVELOPERS.md)"),
)

SCHEMAS: dict[str, tuple[Column, ...]] = {
    "lines": _LINES,
    "tracks": _TRACKS,
    "cell_frames": _CELL_FRAMES,
    "cells": _CELLS,
}

_KIND_CHECK = {
    "int": pd.api.types.is_integer_dtype,
    "float": lambda d: pd.api.types.is_float_dtype(d) or pd.api.types.is_integer_dtype(d),
    "bool": pd.api.types.is_bool_dtype,
    "str": lambda d: pd.api.types.is_string_dtype(d) or pd.api.types.is_object_dtype(d),
}

_KIND_DTYPE = {"int": "int64", "float": "float64", "bool": "bool", "str": "object"}


def _schema(name):
    try:
        return SCHEMAS[name]
    except KeyError:
        raise SchemaError("unknown table", field="name", expected=f"one of {sorted(SCHEMAS)}",
                          found=repr(name)) from None


def validate(table: pd.DataFrame, name: str, *, path=None) -> pd.DataFrame:
    """Check ``table`` against the schema ``name`` and return it in canonical form.

    Canonical form: schema columns first in schema order, then extra columns,
    integer and float columns as int64/float64, a fresh RangeIndex.

    Raises
    ------
    SchemaError
        Naming the table (or ``path``), the column, the expected kind and
        what was found.
    """
    where = path if path is not None else f"table '{name}'"
    if not isinstance(table, pd.DataFrame):
        raise SchemaError("not a table", path=where, expected="a pandas DataFrame",
                          found=type(table).__name__)
    cols = _schema(name)
    absent = [c for c in cols if c.name not in table.columns and c.default is not None]
    if absent:  # columns added to a schema later: tables written before them get the default
        table = table.assign(**{c.name: np.full(len(table), c.default, dtype=_KIND_DTYPE[c.kind])
                                for c in absent})
    missing = [c.name for c in cols if c.name not in table.columns]
    if missing:
        raise SchemaError("missing columns", path=where, field=", ".join(missing),
                          expected="present", found="absent")
    out = {}
    for c in cols:
        s = table[c.name]
        if len(s) and not _KIND_CHECK[c.kind](s.dtype):
            raise SchemaError("wrong column type", path=where, field=c.name,
                              expected=c.kind, found=str(s.dtype))
        if c.kind == "str":
            out[c.name] = s.astype(object).to_numpy()
        else:
            out[c.name] = s.to_numpy().astype(_KIND_DTYPE[c.kind], copy=False)
    for extra in table.columns:
        if extra not in out:
            out[extra] = table[extra].to_numpy()
    return pd.DataFrame(out)


def empty(name: str) -> pd.DataFrame:
    """An empty table with the schema's columns and dtypes."""
    return pd.DataFrame({c.name: pd.Series(dtype=_KIND_DTYPE[c.kind]) for c in _schema(name)})


def describe(name: str) -> str:
    """The schema as a Markdown table (used in the docs)."""
    rows = ["| column | kind | unit | meaning |", "|---|---|---|---|"]
    rows += [f"| `{c.name}` | {c.kind} | {c.unit or '-'} | {c.description} |" for c in _schema(name)]
    return "\n".join(rows)
