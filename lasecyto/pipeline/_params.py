"""Stage parameters: defaults, recipes (TOML) and manifest overrides."""

from __future__ import annotations

import copy
import math
import tomllib
from pathlib import Path

from ..exceptions import InputError

__all__ = ["DEFAULT_PARAMETERS", "load_recipe", "resolve_parameters"]

#: Default parameters of every stage.  ``pipelines/fabry_perot_timelapse.toml``
#: holds the same values with a comment per key; a test keeps the two equal.
DEFAULT_PARAMETERS: dict[str, dict] = {
    "calibration": {
        "degree": 3,              # dispersion polynomial degree
        "clip_sigma": 4.0,        # outlier rejection of lamp lines
        "snr_min": 10.0,          # lamp peaks used for matching
        "air_formula": "morton2000",
    },
    "lines": {
        "shape": "lorentzian",
        "snr_min": 5.0,           # detection threshold (matched filter, Poisson + read noise)
        "fwhm_guess_px": 2.5,
        "baseline": "snip",
        "baseline_window_px": 30,
        "block_frames": 256,      # frames read and fitted together
        "voigt_gaussian_fwhm_px": 0.0,  # Voigt only: fixed Gaussian FWHM, 0 = fitted
        "cosmic_width_ratio": 0.5,      # spikes narrower than this many instrument FWHM ...
        "cosmic_match_px": 1.5,         # ... with no line this close in the next or previous frame
    },
    "lasing": {
        "max_fwhm_px": 8.0,       # wider lines are fluorescence, not lasing (without a lamp)
        "snr_min": 10.0,
        "max_width_ratio": 1.5,   # with a lamp: at most this many instrument FWHM wide
        "min_contrast": 1.0,      # peak at least this many times the background under it
    },
    "tracks": {
        "max_step_nm": 0.15,      # gate per frame after motion prediction
        "max_gap_frames": 3,
        "min_length_frames": 3,
    },
    "verdict": {
        "z_min": 5.0,
        "min_index_change": 2e-4,
        "min_relative_shift": 1.5e-4,
        "k_sigma": 5.0,
        "n_consecutive": 3,
        "settle_fraction": 0.25,
    },
}


def load_recipe(path) -> dict:
    """Read a recipe file (TOML tables named after stages)."""
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise InputError("recipe not found", path=path, expected="an existing TOML file",
                         found="no such file") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError("recipe is not valid TOML", path=path, expected="TOML", found=str(exc)) from None


def _check_value(default, value, where, problems):
    if isinstance(default, bool):
        ok = isinstance(value, bool)
        kind = "true or false"
    elif isinstance(default, int):
        ok = isinstance(value, int) and not isinstance(value, bool)
        kind = "an integer"
    elif isinstance(default, float):
        ok = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
        kind = "a finite number"
    else:
        ok = isinstance(value, str)
        kind = "a string"
    if not ok:
        problems.append(f"{where}: expected {kind}, found {value!r}")
        return default
    return float(value) if isinstance(default, float) else value


def resolve_parameters(*layers, source="parameters") -> dict:
    """Merge parameter layers (recipe, then manifest overrides) over the defaults.

    Every unknown stage or key and every value of the wrong type is reported
    at once in one :class:`InputError`.
    """
    params = copy.deepcopy(DEFAULT_PARAMETERS)
    problems = []
    for layer in layers:
        if not layer:
            continue
        for stage, values in layer.items():
            if stage not in params:
                problems.append(f"{stage}: unknown stage (expected one of {sorted(params)})")
                continue
            if not isinstance(values, dict):
                problems.append(f"{stage}: expected a table of parameters, found {values!r}")
                continue
            for key, value in values.items():
                if key not in params[stage]:
                    problems.append(f"{stage}.{key}: unknown parameter "
                                    f"(expected one of {sorted(params[stage])})")
                    continue
                params[stage][key] = _check_value(DEFAULT_PARAMETERS[stage][key], value,
                                                  f"{stage}.{key}", problems)
    if problems:
        raise InputError("; ".join(problems), path=source)
    return params
