"""Schemas of the tidy tables passed between stages.

Each table is long and tidy (one row per observation, a plain RangeIndex) and
carries its units in its column names (``_nm``, ``_px``, ``_s``, ``_um``,
``_counts``).  Wavelengths are vacuum wavelengths.  A table may carry extra
columns; the columns listed here must be present with the stated kind, except
those marked optional (``required=False``), which are kind-checked and put in
schema order when present, and columns with a ``fill`` value: a stage that has
nothing to say about them may leave them out, and :func:`validate` adds them
filled with that value (NaN, ``""``, False or 0), so every table of one name
has those columns.

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
    required: bool = True  # False: optional, kind-checked and put in schema order when present
    fill: object = None    # value of the column when a stage leaves it out (None: no fill)


def _c(name, kind, unit, description, required=True, fill=None):
    return Column(name, kind, unit, description, required, fill)


_NAN = float("nan")


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
       fill=False),
    _c("contrast", "float", "", "peak line signal over the background under it", fill=_NAN),
)

_TRACKS = _LINES + (
    _c("track_id", "int", "", "mode track within the cell, from 0"),
    _c("mode_family", "int", "", "comb family of the track: 0 is the family carrying most power"),
    _c("mode_number", "int", "",
       "mode number: longitudinal q (Fabry-Perot) or angular number l (sphere); -1 when not assigned", fill=-1),
    _c("transverse_order", "int", "", "transverse order k of the track's family, 0 = fundamental (-1 unknown)",
       fill=-1),
    _c("hop", "bool", "", "first row of a track that began by a mode hop of about one FSR from another track",
       fill=False),
    _c("polarization", "str", "", "sphere: 'TE' or 'TM' of the track's mode ('' when not assigned)", fill=""),
    _c("radial_order", "int", "", "sphere: radial order of the track's mode, from 1 (-1 when not assigned)", fill=-1),
)

_CELL_FRAMES = (
    _c("cell_id", "str", "", "cell identifier"),
    _c("frame", "int", "", "frame index"),
    _c("time_s", "float", "s", "frame time"),
    _c("n_lines", "int", "", "lines fitted in this frame"),
    _c("n_lasing", "int", "", "lines judged lasing"),
    _c("total_area_counts", "float", "counts", "summed area of the lasing lines"),
    _c("lasing", "bool", "", "at least one lasing line in the frame (image-only cells: a lasing region)"),
    _c("fsr_nm", "float", "nm", "free spectral range of the main comb family at its centre"),
    _c("optical_length_um", "float", "um", "group optical length n_g L from the comb spacing"),
    _c("optical_length_err_um", "float", "um", "1-sigma uncertainty"),
    _c("relative_shift", "float", "", "weighted mean of (lambda - lambda_baseline)/lambda_baseline over tracks"),
    _c("relative_shift_err", "float", "", "1-sigma uncertainty"),
    _c("delta_optical_length_um", "float", "um", "change of the phase optical length n L since baseline"),
    _c("delta_optical_length_err_um", "float", "um", "1-sigma uncertainty"),
    _c("index_change", "float", "",
       "change of the cell's refractive index since baseline (needs gap_um or cell_thickness_um); "
       "sphere: of the medium index around the bead"),
    _c("index_change_err", "float", "", "1-sigma uncertainty"),
    _c("reference_nm", "float", "nm", "wavelength at which phase_optical_length_um is given (per cell)", False),
    _c("phase_optical_length_um", "float", "um",
       "phase optical length n L at reference_nm from absolute mode numbers (needs a gap medium)", False),
    _c("phase_optical_length_err_um", "float", "um", "1-sigma uncertainty", False),
    _c("gouy_fraction", "float", "", "transverse-ladder spacing / free spectral range (Gouy phase / pi)", False),
    _c("gouy_fraction_err", "float", "", "1-sigma uncertainty", False),
    _c("lens_focal_length_um", "float", "um",
       "focal length of the cell lens on a flat mirror, L / sin^2(pi gouy_fraction) (needs gap_um)", False),
    _c("lens_focal_length_err_um", "float", "um", "1-sigma uncertainty", False),
    _c("pattern_order", "str", "", "best transverse order of the cell's emission image, 'HGmn' or 'LGpl'", fill=""),
    _c("pattern_confidence", "float", "", "1 - RSS_best / RSS_second of the order fit", fill=_NAN),
    _c("pattern_waist_px", "float", "px", "fitted beam radius w of the emission pattern", fill=_NAN),
    _c("pattern_orientation_deg", "float", "deg", "turn of the pattern's HG axes from +col towards +row", fill=_NAN),
    _c("pattern_corr", "float", "", "correlation with the cell's previous pattern (aligned)", fill=_NAN),
    _c("pattern_change", "bool", "", "pattern_corr fell below the change threshold", fill=False),
    _c("pattern_baseline_corr", "float", "",
       "correlation with the cell's mean pattern before the perturbation (aligned)", fill=_NAN),
    _c("diameter_um", "float", "um", "sphere: bead diameter from the frame's fit", fill=_NAN),
    _c("diameter_err_um", "float", "um", "1-sigma uncertainty", fill=_NAN),
    _c("medium_index", "float", "", "sphere: index around the bead at sphere.reference_nm", fill=_NAN),
    _c("medium_index_err", "float", "", "1-sigma uncertainty", fill=_NAN),
    _c("diameter_change_um", "float", "um", "sphere: change of the bead diameter since baseline", fill=_NAN),
    _c("diameter_change_err_um", "float", "um", "1-sigma uncertainty", fill=_NAN),
    _c("sphere_lines", "int", "", "sphere: lines used in the frame's fit (0: no fit)", fill=0),
    _c("sphere_rms_nm", "float", "nm", "sphere: rms residual of the frame's fit", fill=_NAN),
    _c("pump_energy_nj", "float", "nJ", "pump series: pulse energy of the frame (sidecar)", fill=_NAN),
    _c("pump_fluence_j_cm2", "float", "J/cm2", "pump series: fluence of the frame (peak for a Gaussian spot)", fill=_NAN),
    _c("output_counts_per_s", "float", "counts/s", "pump series: summed line area per second of exposure", fill=_NAN),
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
    _c("self_changed", "bool", "", "the change is significant and large against the cell's own baseline", fill=False),
    _c("change_score", "float", "", "robust z-score of the flagged feature against the control population", fill=_NAN),
    _c("p_value", "float", "", "p-value of change_score, calibrated on the controls", fill=_NAN),
    _c("q_value", "float", "", "Benjamini-Hochberg q-value across the scored cells", fill=_NAN),
    _c("is_control", "bool", "", "the cell belongs to a control condition of the manifest", fill=False),
    _c("pattern_dominant_order", "str", "", "most frequent well-fitted transverse order of the emission image",
       fill=""),
    _c("pattern_decorrelation_time_s", "float", "s", "lag at which the pattern correlation falls to 1/e", fill=_NAN),
    _c("pattern_change_count", "int", "", "pattern change events over the acquisition", fill=0),
    _c("pattern_first_change_s", "float", "s",
       "time of the first pattern change event at or after perturbation_s", fill=_NAN),
    _c("cv_prediction", "str", "", "out-of-fold (grouped by dish) predicted label", fill=""),
    _c("cv_probability", "float", "", "out-of-fold probability of cv_prediction", fill=_NAN),
    _c("model_prediction", "str", "", "label predicted by the manifest's classifier model", fill=""),
    _c("model_probability", "float", "", "probability of model_prediction", fill=_NAN),
    _c("anomaly_score", "float", "", "isolation-forest anomaly score against the controls (higher: more unusual)",
       fill=_NAN),
)

_PATTERNS = (
    _c("cell_id", "str", "", "manifest cell of the region (empty when not matched to one)"),
    _c("frame", "int", "", "frame index, from 0"),
    _c("time_s", "float", "s", "frame time"),
    _c("track_id", "int", "", "region track (cell identity within the image stack), from 0"),
    _c("region", "int", "", "region label within the frame, from 1"),
    _c("centroid_row_px", "float", "px", "background-subtracted intensity centroid, row"),
    _c("centroid_col_px", "float", "px", "background-subtracted intensity centroid, column"),
    _c("area_px", "int", "px", "region area in pixels"),
    _c("area_um2", "float", "um2", "region area (NaN without a pixel size)"),
    _c("peak_counts", "float", "counts", "brightest pixel above background"),
    _c("total_counts", "float", "counts", "summed signal above background"),
    _c("n_saturated_px", "int", "px", "saturated pixels in the region"),
    _c("saturated", "bool", "", "the region holds a saturated pixel"),
    _c("background_counts", "float", "counts", "background level at the centroid"),
    _c("noise_counts", "float", "counts", "background noise (robust standard deviation) of the frame"),
    _c("center_row_px", "float", "px", "fitted mode centre, row"),
    _c("center_col_px", "float", "px", "fitted mode centre, column"),
    _c("waist_px", "float", "px", "fitted beam radius w of the best order"),
    _c("waist_um", "float", "um", "fitted beam radius (NaN without a pixel size)"),
    _c("orientation_deg", "float", "deg", "turn of the HG axes from +col towards +row (NaN for round orders)"),
    _c("mode_order", "str", "", "best order, 'HGmn' or 'LGpl'"),
    _c("mode_status", "str", "", "ok, mixed, irregular or failed"),
    _c("mode_confidence", "float", "", "1 - RSS_best / RSS_second"),
    _c("mode_explained", "float", "", "fraction of the region's variance explained by the best order"),
    _c("mode_second_order", "str", "", "second-best order"),
    _c("mode_mixture_explained", "float", "", "fraction explained by the best two-order mixture"),
    _c("sigma_major_px", "float", "px", "square root of the major second moment"),
    _c("sigma_minor_px", "float", "px", "square root of the minor second moment"),
    _c("moment_orientation_deg", "float", "deg", "major axis from +col towards +row"),
    _c("eccentricity", "float", "", "sqrt(1 - minor/major) of the second moments"),
    _c("n_lobes", "int", "", "bright lobes (a ring counts as one)"),
    _c("ring_radius_px", "float", "px", "radius of the azimuthal-mean maximum around the fitted centre"),
    _c("pattern_corr", "float", "", "correlation with the track's previous pattern (aligned, NaN at its first frame)"),
    _c("pattern_change", "bool", "", "pattern_corr below the change threshold"),
    _c("fit_ok", "bool", "", "the mode fit succeeded"),
    _c("fit_message", "str", "", "empty when fit_ok, else the reason"),
)

_PREDICTIONS = (
    _c("cell_id", "str", "", "cell identifier"),
    _c("label", "str", "", "name of the label the model predicts (e.g. condition)"),
    _c("prediction", "str", "", "predicted class (empty when the cell could not be judged)"),
    _c("probability", "float", "", "model probability of the predicted class"),
    _c("prediction_note", "str", "", "empty, or why the cell was not predicted"),
    _c("baseline_diameter_um", "float", "um", "sphere: median bead diameter before the perturbation", fill=_NAN),
    _c("baseline_medium_index", "float", "", "sphere: median medium index before the perturbation", fill=_NAN),
    _c("diameter_change_um", "float", "um", "sphere: settled change of the bead diameter", fill=_NAN),
    _c("diameter_change_err_um", "float", "um", "1-sigma uncertainty", fill=_NAN),
    _c("threshold_nj", "float", "nJ", "pump series: lasing threshold of the main mode (S-curve fit)", fill=_NAN),
    _c("threshold_err_nj", "float", "nJ", "1-sigma uncertainty", fill=_NAN),
    _c("beta", "float", "", "pump series: spontaneous-emission factor of the main mode", fill=_NAN),
    _c("beta_err", "float", "", "1-sigma uncertainty", fill=_NAN),
    _c("threshold_fluence_j_cm2", "float", "J/cm2", "pump series: threshold fluence (needs the pump spot)", fill=_NAN),
)

_THRESHOLDS = (
    _c("cell_id", "str", "", "cell identifier"),
    _c("track_id", "int", "", "mode track of the cell (its lines in the tracks table)"),
    _c("center_nm", "float", "nm", "median wavelength of the mode"),
    _c("n_points", "int", "", "frames (pump values) in the fit"),
    _c("pump_min_nj", "float", "nJ", "lowest pump energy of the fit"),
    _c("pump_max_nj", "float", "nJ", "highest pump energy of the fit"),
    _c("threshold_nj", "float", "nJ", "threshold pump energy of the rate-equation S-curve fit"),
    _c("threshold_err_nj", "float", "nJ", "1-sigma uncertainty"),
    _c("beta", "float", "", "spontaneous-emission coupling factor"),
    _c("beta_err", "float", "", "1-sigma uncertainty"),
    _c("slope_counts_per_s_per_nj", "float", "counts/s/nJ", "slope efficiency well above threshold"),
    _c("slope_err_counts_per_s_per_nj", "float", "counts/s/nJ", "1-sigma uncertainty"),
    _c("linear_threshold_nj", "float", "nJ", "x-intercept of a straight line above threshold (biased low)"),
    _c("linear_slope_counts_per_s_per_nj", "float", "counts/s/nJ", "slope of that straight line"),
    _c("linear_n_points", "int", "", "frames in the straight-line fit"),
    _c("linear_bias", "float", "", "expected relative bias of linear_threshold_nj for the fitted beta"),
    _c("threshold_fluence_j_cm2", "float", "J/cm2", "threshold fluence (peak for a Gaussian spot; needs the spot)"),
    _c("max_fluence_j_cm2", "float", "J/cm2", "largest pump fluence of the series (needs the spot)"),
    _c("max_fluence_skin_mpe_ratio", "float", "", "largest fluence / skin MPE (ANSI Z136.1, IEC 60825-1; cautions apply)"),
    _c("rms_log", "float", "", "rms of the log-output residuals"),
    _c("fwhm_low_pump_nm", "float", "nm", "median line FWHM over the lowest-pump quarter of the frames"),
    _c("fwhm_high_pump_nm", "float", "nm", "median line FWHM over the highest-pump quarter of the frames"),
    _c("instrument_fwhm_nm", "float", "nm", "instrument FWHM the widths are judged against (manifest)"),
    _c("narrowing_ratio", "float", "", "fwhm_low_pump_nm / fwhm_high_pump_nm"),
    _c("instrument_limited", "bool", "", "the width at the highest pumps is within 1.1 x the instrument FWHM"),
    _c("fit_ok", "bool", "", "the S-curve fit converged with threshold inside the pump range and 0 < beta < 1"),
    _c("fit_message", "str", "", "empty when fit_ok, else the reason"),
)

SCHEMAS: dict[str, tuple[Column, ...]] = {
    "lines": _LINES,
    "tracks": _TRACKS,
    "cell_frames": _CELL_FRAMES,
    "cells": _CELLS,
    "patterns": _PATTERNS,
    "predictions": _PREDICTIONS,
    "thresholds": _THRESHOLDS,
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
    cols = tuple(c for c in _schema(name) if c.required or c.fill is not None or c.name in table.columns)
    missing = [c.name for c in cols if c.name not in table.columns and c.fill is None]
    if missing:
        raise SchemaError("missing columns", path=where, field=", ".join(missing),
                          expected="present", found="absent")
    out = {}
    for c in cols:
        if c.name not in table.columns:
            out[c.name] = np.full(len(table), c.fill, dtype=_KIND_DTYPE[c.kind])
            continue
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
    rows += [f"| `{c.name}` | {c.kind}{'' if c.required else ' (optional)'} | {c.unit or '-'} | {c.description} |"
             for c in _schema(name)]
    return "\n".join(rows)
