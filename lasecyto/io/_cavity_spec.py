"""Manifest tables that describe the cavity and the pump: ``[sphere]`` and ``[pump]``.

Both are validated into plain dicts (picklable, passed to every worker); every problem
is added to the manifest's problem list, so that all of them are reported at once.

``[sphere]`` (required when ``experiment.resonator = "sphere"``)::

    bead_material = "ps-ma"          # named dispersion of the bead (lasecyto.cavity.media.MEDIA)
    # bead_index = 1.59              # ... or a constant bead index (exactly one of the two)
    medium = "water-daimon"          # base dispersion of the surroundings (default water-daimon);
                                     # a constant index offset to it is fitted per frame
    temperature_c = 20.0             # optional: for medium "water-iapws"
    diameter_range_um = [8.0, 16.0]  # bead diameters to search
    medium_index_range = [1.33, 1.41]  # optional: bounds of the index around the bead

``[pump]`` (required when ``experiment.kind = "pump-series"``)::

    wavelength_nm = 470.0            # pump wavelength
    pulse_s = 5e-9                   # pulse duration (FWHM)
    beam = "tophat"                  # "tophat" or "gaussian"
    spot_diameter_um = 20.0          # optional: top-hat diameter or Gaussian 1/e^2 diameter
    instrument_fwhm_nm = 0.12        # optional: spectrometer FWHM for the linewidth judgement
"""

from __future__ import annotations

import math
import numbers

__all__ = ["KINDS", "DEFAULT_MEDIUM_INDEX_RANGE", "parse_sphere", "parse_pump"]

#: experiment kinds (``experiment.kind``)
KINDS = ("time-lapse", "pump-series")
#: bounds of the index around a bead when the manifest gives none (water to dense cytoplasm)
DEFAULT_MEDIUM_INDEX_RANGE = (1.33, 1.41)

_SPHERE_KEYS = ("bead_material", "bead_index", "medium", "temperature_c", "diameter_range_um",
                "medium_index_range")
_PUMP_KEYS = ("wavelength_nm", "pulse_s", "beam", "spot_diameter_um", "instrument_fwhm_nm")


def _is_number(v):
    return isinstance(v, numbers.Real) and not isinstance(v, bool) and math.isfinite(v)


def _show(value):
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _unknown_keys(doc, allowed, where, problems):
    for key in doc:
        if key not in allowed:
            problems.add(f"{where}.{key}", "unknown key", f"one of {', '.join(allowed)}", "present")


def _pair(doc, key, where, problems, *, low=0.0):
    v = doc[key]
    ok = (isinstance(v, list) and len(v) == 2 and all(_is_number(x) for x in v)
          and low < v[0] < v[1])
    if not ok:
        problems.add(f"{where}.{key}", "bad range", f"[low, high] numbers with {low:g} < low < high", _show(v))
        return None
    return (float(v[0]), float(v[1]))


def _positive(doc, key, where, problems, *, required):
    if key not in doc:
        if required:
            problems.add(f"{where}.{key}", "missing", "a number > 0", "absent")
        return None
    v = doc[key]
    if not (_is_number(v) and v > 0):
        problems.add(f"{where}.{key}", "bad number", "a number > 0", _show(v))
        return None
    return float(v)


def _medium(name, where, key, temperature, problems):
    """Check that a named dispersion exists (and accepts the temperature); returns the name."""
    from ..cavity.media import MEDIA, get_medium
    from ..exceptions import InputError

    if not isinstance(name, str) or name.strip().lower() not in MEDIA:
        problems.add(f"{where}.{key}", "unknown dispersion", f"one of {', '.join(MEDIA)}", _show(name))
        return None
    name = name.strip().lower()
    try:
        get_medium(name, temperature_c=temperature if name == "water-iapws" else None)
    except InputError as exc:  # the formula's own limits (its advice on arguments does not apply here)
        problems.add(f"{where}.temperature_c", exc.message.split(";")[0], exc.expected, exc.found)
        return None
    return name


def _present(doc, where, problems, *, required, keys, what):
    """True when the table is there and a table (problems recorded otherwise)."""
    if doc is None:
        if required:
            problems.add(where, "missing table", f"a [{where}] table ({what})", "absent")
        return False
    if not isinstance(doc, dict):
        problems.add(where, "not a table", f"a [{where}] table", type(doc).__name__)
        return False
    _unknown_keys(doc, keys, where, problems)
    return True


def parse_sphere(doc, problems, *, required):
    """Validate the ``[sphere]`` table into a dict (None when absent or invalid)."""
    where = "sphere"
    n_before = len(problems.items)
    if not _present(doc, where, problems, required=required, keys=_SPHERE_KEYS,
                    what="bead_material, diameter_range_um"):
        return None
    temperature = None
    if "temperature_c" in doc:
        if _is_number(doc["temperature_c"]):
            temperature = float(doc["temperature_c"])
        else:
            problems.add(f"{where}.temperature_c", "bad number", "a temperature in degC", _show(doc["temperature_c"]))
    out = {"bead_material": None, "bead_index": None, "medium": "water-daimon", "temperature_c": temperature}
    if ("bead_material" in doc) == ("bead_index" in doc):
        problems.add(where, "bead index needed", "exactly one of bead_material or bead_index",
                     "both" if "bead_material" in doc else "neither")
    elif "bead_material" in doc:
        out["bead_material"] = _medium(doc["bead_material"], where, "bead_material", None, problems)
    else:
        out["bead_index"] = _positive(doc, "bead_index", where, problems, required=True)
    if "medium" in doc:
        out["medium"] = _medium(doc["medium"], where, "medium", temperature, problems)
    if temperature is not None and out["medium"] not in (None, "water-iapws"):
        problems.add(f"{where}.temperature_c", "only medium 'water-iapws' takes a temperature",
                     'medium = "water-iapws" or no temperature_c', _show(temperature))
    if "diameter_range_um" not in doc:
        problems.add(f"{where}.diameter_range_um", "missing", "[low, high] bead diameters in um", "absent")
        out["diameter_range_um"] = None
    else:
        out["diameter_range_um"] = _pair(doc, "diameter_range_um", where, problems)
    out["medium_index_range"] = (_pair(doc, "medium_index_range", where, problems, low=1.0)
                                 if "medium_index_range" in doc else DEFAULT_MEDIUM_INDEX_RANGE)
    if out["bead_index"] is not None and out["medium_index_range"] is not None \
            and out["medium_index_range"][1] >= out["bead_index"]:
        problems.add(f"{where}.medium_index_range", "reaches the bead index",
                     f"high < bead_index {out['bead_index']:g}", _show(list(out["medium_index_range"])))
    return out if len(problems.items) == n_before else None


def parse_pump(doc, problems, *, required):
    """Validate the ``[pump]`` table into a dict (None when absent or invalid)."""
    where = "pump"
    n_before = len(problems.items)
    if not _present(doc, where, problems, required=required, keys=_PUMP_KEYS,
                    what="wavelength_nm, pulse_s for a pump series"):
        return None
    out = {
        "wavelength_nm": _positive(doc, "wavelength_nm", where, problems, required=True),
        "pulse_s": _positive(doc, "pulse_s", where, problems, required=True),
        "spot_diameter_um": _positive(doc, "spot_diameter_um", where, problems, required=False),
        "instrument_fwhm_nm": _positive(doc, "instrument_fwhm_nm", where, problems, required=False),
        "beam": doc.get("beam", "tophat"),
    }
    if out["beam"] not in ("tophat", "gaussian"):
        problems.add(f"{where}.beam", "unknown beam profile", "'tophat' or 'gaussian'", _show(out["beam"]))
    return out if len(problems.items) == n_before else None
