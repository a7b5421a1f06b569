"""Packaged lamp reference lines (NIST ASD air wavelengths), read with importlib.resources."""

from __future__ import annotations

import functools
from importlib import resources

import numpy as np
import pandas as pd

from ..exceptions import InputError

__all__ = ["REFERENCE_SETS", "reference_lines"]

#: Known reference line sets and the packaged file holding each one.
REFERENCE_SETS = {
    "Ne I": "ne_i_air.csv",
    "Hg I": "hg_i_air.csv",
    "Ar I": "ar_i_air.csv",
}

_COLUMNS = ["wavelength_air_nm", "relative_intensity", "note", "species"]


@functools.lru_cache(maxsize=None)
def _load(species):
    source = resources.files(__package__).joinpath("data", REFERENCE_SETS[species])
    with source.open("r", encoding="utf-8") as fh:
        df = pd.read_csv(fh, comment="#", dtype={"wavelength_air_nm": "float64",
                                                  "relative_intensity": "float64"},
                         keep_default_na=False, na_values={"wavelength_air_nm": [""],
                                                           "relative_intensity": [""]})
    df["note"] = df["note"].astype(str).str.strip()
    df["species"] = species
    return df[_COLUMNS]


def _canonical(part):
    key = " ".join(part.split()).casefold()
    for name in REFERENCE_SETS:
        if name.casefold() == key:
            return name
    return None


def reference_lines(name):
    """Reference lamp lines of one species or a combination.

    Parameters
    ----------
    name : str
        ``"Ne I"``, ``"Hg I"``, ``"Ar I"`` or several joined by ``+``, e.g.
        ``"Ne I + Hg I"`` (case and spacing are not significant).

    Returns
    -------
    pandas.DataFrame
        Columns ``wavelength_air_nm`` (nm, standard air), ``relative_intensity``
        (NIST, for ranking only), ``note`` (contains ``"blend"`` for close pairs)
        and ``species``; sorted by wavelength, plain RangeIndex.

    Raises
    ------
    InputError
        For an unknown name; the message lists the known names.
    """
    known = " | ".join(repr(k) for k in REFERENCE_SETS)
    if not isinstance(name, str) or not name.strip():
        raise InputError("reference line set must be named", field="name",
                         expected=f"one of {known} or several joined by ' + '", found=repr(name))
    species = []
    for part in name.split("+"):
        canon = _canonical(part)
        if canon is None:
            raise InputError("unknown reference line set", field="name",
                             expected=f"one of {known} or several joined by ' + '",
                             found=repr(part.strip()))
        if canon not in species:
            species.append(canon)
    df = pd.concat([_load(s) for s in species], ignore_index=True)
    order = np.argsort(df["wavelength_air_nm"].to_numpy(), kind="stable")
    return df.iloc[order].reset_index(drop=True)
