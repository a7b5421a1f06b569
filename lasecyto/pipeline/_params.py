"""Stage parameters: defaults, recipes (TOML) and manifest overrides.

A recipe is a TOML file of stage tables (``[lines]``, ``[tracks]``, ...).  The
built-in recipes ship inside the package (``lasecyto/pipeline/recipes/``, so
they are found after any kind of install); ``pipelines/`` at the top of the
repository is the user-facing copy of the same files (a test keeps the two
identical; ``tools/sync_recipes.py`` copies ``pipelines/`` into the package).
A recipe is named either by a path or by the name of a built-in recipe
(``fabry_perot_timelapse``, with or without ``.toml``).
"""

from __future__ import annotations

import copy
import importlib.resources
import math
import tomllib
from pathlib import Path

from ..exceptions import InputError

__all__ = ["DEFAULT_PARAMETERS", "builtin_recipes", "find_recipe", "load_recipe", "parameter_problems",
           "resolve_parameters"]

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
        "intensity_scale": 0.5,   # log intensity ratio costing as much as a third of the gate
        "width_scale": 0.3,       # log width ratio costing as much as a third of the gate
        "hop_tolerance": 0.05,    # a hop lands within this fraction of one comb spacing
    },
    "cavity": {
        "index_offset_range": 0.3,   # gap index - medium index searched for mode numbers
        "ladder_tolerance": 0.02,    # cycles: family offsets must sit this close to k x Gouy fraction
        "max_transverse_order": 6,
        "group_index_min": 1.0,      # with gap_um, the comb is searched for n_g L in
        "group_index_max": 2.0,      # gap_um x [group_index_min, group_index_max]
    },
    "verdict": {
        "z_min": 5.0,
        "min_index_change": 2e-4,
        "min_relative_shift": 1.5e-4,
        "min_pattern_change": 0.1,  # image-only cells: drop of the correlation with the baseline pattern
        "k_sigma": 5.0,
        "n_consecutive": 3,
        "settle_fraction": 0.25,
    },
    "patterns": {
        "spot_radius_px": 10.0,   # typical radius of one cell's emission pattern in the images
        "threshold_sigma": 5.0,   # region detection threshold (background noise units)
        "min_area_px": 12,
        "min_explained": 0.9,     # an order must explain this fraction of the pattern ("ok")
        "max_displacement_px": 6.0,  # region linking gate per frame
        "max_gap_frames": 3,
        "change_corr": 0.9,       # pattern change event: correlation with the previous pattern below this
        "max_lag_frames": 20,     # longest lag for the decorrelation time
        "window_px": 32,          # half-size of the image window analysed around a cell's position
        "match_distance_px": 12.0,  # a region track belongs to the nearest cell position within this
        "block_frames": 32,       # image frames read at once
    },
    "features": {
        "min_frames": 10,         # fewer frames: no feature catalogue for the cell (a note says why)
        "penalty_factor": 6.0,    # change points: penalty = factor x noise^2 x ln(n)
        "min_step_sigma": 5.0,    # an onset change point must step by this many noise units
    },
    "flags": {
        "feature": "index_change",  # cells column scored against the control population
        "fdr": 0.05,              # Benjamini-Hochberg false discovery rate
        "method": "auto",         # p-values: "auto", "permutation" or "gaussian"
        "min_effect": 0.0,        # smallest |feature| flagged, for a feature other than index_change
        "n_draws": 20000,         # Monte Carlo draws of the gaussian reference
        "seed": 0,
    },
    "classify": {
        "label": "condition",     # cells column learned with grouped cross-validation ("" = none)
        "estimator": "logistic",  # "logistic" or "forest"
        "features": "response",   # "response" (RESPONSE_FEATURE_KEYS) or "all" catalogue features
        "n_splits": 5,            # folds (at most the number of dishes)
        "seed": 0,
        "anomaly": False,         # isolation-forest anomaly score against the controls
    },
    "sphere": {                   # bead (whispering-gallery) resonators only
        "max_radial_order": 2,    # radial orders 1..N considered in the mode identification
        "wavelength_floor_nm": 0.001,  # systematic line error added in quadrature (calibration)
        "assign_frames": 3,       # frames with most lines tried for the mode identification
        "tolerance_nm": 0.02,     # largest distance of a later track from its predicted mode
        "min_lines": 3,           # frames with fewer identified lines get no size/index fit
        "reference_nm": 600.0,    # wavelength of the reported medium index
        "judge": "medium_index",  # series the verdict judges: "medium_index" or "diameter"
        "min_diameter_change_um": 0.005,  # with judge = "diameter": smallest change flagged
    },
    "threshold": {                # pump series only
        "max_modes": 3,           # modes fitted per cell, by output at the highest pumps
        "min_points": 6,          # a mode needs this many distinct pump energies
        "linear_min_x": 2.0,      # straight line above threshold: from this many x threshold ...
        "linear_max_x": 5.0,      # ... to this many
        "output_floor": 0.02,     # relative error added in quadrature to every output
        "resolved_factor": 1.1,   # a width above this x the instrument FWHM counts as resolved
    },
}


def builtin_recipes() -> dict:
    """The recipes shipped with the package: ``{name: path}``, sorted by name."""
    root = importlib.resources.files(__package__) / "recipes"
    out = {}
    for entry in root.iterdir():
        if entry.name.endswith(".toml") and entry.is_file():
            out[entry.name[:-5]] = Path(str(entry))
    return dict(sorted(out.items()))


def find_recipe(name_or_path, *, base_dir=None, field="recipe") -> Path:
    """Locate a recipe given as a path or as the name of a built-in recipe.

    Parameters
    ----------
    name_or_path : str or os.PathLike
        A TOML file (relative paths are taken from ``base_dir``, default the
        working directory) or a built-in recipe name such as
        ``"fabry_perot_timelapse"`` (``".toml"`` may be added).  An existing
        file wins over a built-in recipe of the same name.
    base_dir : path, optional
        Directory of relative paths (the manifest's directory for a recipe
        named in a manifest).
    field : str
        Where the name came from, for the error message.

    Raises
    ------
    InputError
        Neither a file nor a built-in recipe; the message lists the built-in names.
    """
    text = str(name_or_path)
    path = Path(text).expanduser()
    if not path.is_absolute() and base_dir is not None:
        path = Path(base_dir) / path
    if path.is_file():
        return path
    builtin = builtin_recipes()
    key = text[:-5] if text.endswith(".toml") else text
    if key in builtin:
        return builtin[key]
    raise InputError("recipe not found", path=path, field=field,
                     expected=f"a TOML file or a built-in recipe ({', '.join(builtin) or 'none'})",
                     found=f"no such file or built-in recipe {text!r}")


def load_recipe(path, *, base_dir=None) -> dict:
    """Read a recipe (TOML tables named after stages), given as a path or a built-in name."""
    path = find_recipe(path, base_dir=base_dir)
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise InputError("recipe is not valid TOML", path=path, expected="TOML", found=str(exc)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError("recipe unreadable", path=path, expected="a readable TOML file",
                         found=" ".join(str(exc).split())) from None


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


def parameter_problems(*layers, sources=None, prefixes=None):
    """Merge parameter layers over the defaults and list every problem.

    Parameters
    ----------
    *layers : dict or None
        Parameter tables, later layers overriding earlier ones.
    sources : sequence of str, optional
        The file each layer came from; each problem starts with it.
    prefixes : sequence of str, optional
        Key prefix of each layer in its file (``"parameters."`` for a
        manifest's ``[parameters]`` table).

    Returns
    -------
    (dict, list of str)
        The merged parameters (defaults where a value was bad) and the
        problems, each naming its file, key, what was expected and what was found.
    """
    params = copy.deepcopy(DEFAULT_PARAMETERS)
    problems = []
    for i, layer in enumerate(layers):
        if not layer:
            continue
        found = []
        prefix = prefixes[i] if prefixes is not None else ""
        if not isinstance(layer, dict):
            found.append(f"{prefix.rstrip('.') or 'parameters'}: expected tables of stage parameters, "
                         f"found {layer!r}")
            layer = {}
        for stage, values in layer.items():
            if stage not in params:
                found.append(f"{prefix}{stage}: unknown stage (expected one of {sorted(params)}, "
                             f"found {stage!r})")
                continue
            if not isinstance(values, dict):
                found.append(f"{prefix}{stage}: expected a table of parameters, found {values!r}")
                continue
            for key, value in values.items():
                if key not in params[stage]:
                    found.append(f"{prefix}{stage}.{key}: unknown parameter "
                                 f"(expected one of {sorted(params[stage])}, found {key!r})")
                    continue
                params[stage][key] = _check_value(DEFAULT_PARAMETERS[stage][key], value,
                                                  f"{prefix}{stage}.{key}", found)
        if sources is not None and sources[i]:
            found = [f"{sources[i]}: {text}" for text in found]
        problems += found
    return params, problems


def resolve_parameters(*layers, source="parameters") -> dict:
    """Merge parameter layers (recipe, then manifest overrides) over the defaults.

    Every unknown stage or key and every value of the wrong type is reported
    at once in one :class:`InputError`.
    """
    params, problems = parameter_problems(*layers)
    if problems:
        raise InputError("; ".join(problems), path=source)
    return params
