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
    },
    "lasing": {
        "max_fwhm_px": 8.0,       # wider lines are fluorescence, not lasing
        "snr_min": 10.0,
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
