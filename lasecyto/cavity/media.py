"""Refractive index and group index of the media around and inside microlasers.

Every medium has the same small interface::

    medium = get_medium("water-iapws", temperature_c=25.0)
    medium.n(wavelength_nm)            # phase index
    medium.group_index(wavelength_nm)  # n - lambda dn/dlambda
    medium.valid_nm                    # (low, high) validity range of the formula

Wavelengths are vacuum wavelengths in nm.  Outside ``valid_nm`` a medium raises
:class:`~lasecyto.exceptions.InputError` unless it was made with
``extrapolate=True``, in which case it warns (:class:`~lasecyto.exceptions.FitWarning`)
and returns the formula's value.  A medium is also callable (``medium(wavelength_nm)``
is ``medium.n(wavelength_nm)``), so it can be passed wherever an index may be a
function of wavelength (e.g. :func:`lasecyto.cavity.sphere.resonance_wavelengths`).

Formulas and sources
--------------------
``water-iapws``
    IAPWS R9-97 (Harvey, Gallagher & Levelt Sengers 1998, J. Phys. Chem. Ref. Data 27,
    761), Lorentz-Lorenz form in density, temperature and wavelength; 200-1100 nm,
    -12 to 500 degC, 0-1060 kg/m^3.  The density is an argument; by default it comes
    from the liquid-water density correlation of Tanaka, Girard, Davis, Peuto & Bignell
    (2001), Metrologia 38, 301 (air-free water at 0.101325 MPa, 0-40 degC; coefficients
    from memory, checked against IAPWS-95 densities at 20, 25 and 37 degC to 0.001 kg/m^3).
``water-daimon``
    Daimon & Masumura (2007), Appl. Opt. 46, 3811: 4-term Sellmeier at 20.0 degC,
    fitted over 182-1129 nm.
``ps-sultanova`` / ``pmma-sultanova``
    One-term Sellmeier fits of Sultanova, Kasarova & Nikolov (2009), Acta Phys. Pol. A
    116, 585 (bulk polystyrene / PMMA), 436.8-1052 nm.
``ps-ma``
    Cauchy fit for polystyrene microspheres of Ma et al. (2003), Phys. Med. Biol. 48,
    4165, 390-1310 nm.
``pmma-kasarova``
    Power series in lambda of Kasarova et al. (2007), Opt. Mater. 29, 1481, 20 degC,
    435.8-1052 nm.

User media: :class:`Cauchy` ``n = A + B/lambda^2 + C/lambda^4`` and :class:`Sellmeier`
``n^2 - 1 = sum B_i lambda^2/(lambda^2 - C_i)`` (lambda in um), with a validity range
the user states (unrestricted by default).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from ..exceptions import FitWarning, InputError

__all__ = [
    "Medium",
    "WaterIAPWS",
    "Sellmeier",
    "Cauchy",
    "PowerSeriesMedium",
    "MEDIA",
    "get_medium",
    "water_density_kg_m3",
]


class Medium:
    """Common interface of all media (see the module docstring).

    Subclasses provide ``valid_nm``, ``extrapolate``, ``name`` and the two private
    methods ``_index_um(lam_um)`` and ``_dindex_um(lam_um)`` (dn/dlambda per um).
    """

    name = "medium"
    valid_nm = (0.0, math.inf)
    extrapolate = False

    def _wavelength_um(self, wavelength_nm):
        lam = np.asarray(wavelength_nm, dtype=float)
        if not np.all(np.isfinite(lam)) or np.any(lam <= 0):
            raise InputError(f"wavelengths for medium '{self.name}' must be positive and finite",
                             field="wavelength_nm", expected="positive finite nm",
                             found=f"{lam[~(np.isfinite(lam) & (lam > 0))].ravel()[:3].tolist()}")
        lo, hi = self.valid_nm
        outside = (lam < lo) | (lam > hi)
        if np.any(outside):
            bad = lam[outside].ravel()
            text = (f"wavelength outside the validity range of medium '{self.name}'"
                    f" ({lo:g}-{hi:g} nm)")
            if not self.extrapolate:
                raise InputError(text + "; pass extrapolate=True to accept an extrapolated value",
                                 field="wavelength_nm", expected=f"{lo:g}-{hi:g} nm",
                                 found=f"{bad.min():g}-{bad.max():g} nm ({bad.size} values)")
            warnings.warn(text + f": {bad.min():g}-{bad.max():g} nm extrapolated", FitWarning,
                          stacklevel=3)
        return lam * 1e-3

    def _checked(self, values, lam_um):
        if not np.all(np.isfinite(values)):
            raise InputError(f"medium '{self.name}' gives no real index at some wavelengths "
                             "(formula pole or negative n^2)", field="wavelength_nm",
                             expected="wavelengths away from the formula's poles",
                             found=f"{(lam_um[~np.isfinite(values)] * 1e3).ravel()[:3].tolist()} nm")
        return values

    def n(self, wavelength_nm):
        """Phase refractive index at vacuum wavelength(s) ``wavelength_nm``."""
        lam_um = self._wavelength_um(wavelength_nm)
        with np.errstate(invalid="ignore", divide="ignore"):
            out = self._index_um(lam_um)
        out = self._checked(out, lam_um)
        return float(out) if out.ndim == 0 else out

    def dn_dlambda_per_nm(self, wavelength_nm):
        """Dispersion dn/dlambda in 1/nm (analytic)."""
        lam_um = self._wavelength_um(wavelength_nm)
        with np.errstate(invalid="ignore", divide="ignore"):
            out = self._dindex_um(lam_um) * 1e-3
        out = self._checked(out, lam_um)
        return float(out) if out.ndim == 0 else out

    def group_index(self, wavelength_nm):
        """Group index n - lambda dn/dlambda (analytic derivative)."""
        lam_um = self._wavelength_um(wavelength_nm)
        with np.errstate(invalid="ignore", divide="ignore"):
            out = self._index_um(lam_um) - lam_um * self._dindex_um(lam_um)
        out = self._checked(out, lam_um)
        return float(out) if out.ndim == 0 else out

    def __call__(self, wavelength_nm):
        return self.n(wavelength_nm)


def _valid_range(name, valid_nm):
    try:
        lo, hi = (float(v) for v in valid_nm)
    except (TypeError, ValueError):
        raise InputError("validity range must be two numbers (low, high) in nm", field=name,
                         expected="(low_nm, high_nm)", found=repr(valid_nm)) from None
    if not (lo >= 0 and hi > lo):
        raise InputError("validity range must satisfy 0 <= low < high", field=name,
                         expected="0 <= low < high", found=f"({lo:g}, {hi:g})")
    return (lo, hi)


@dataclass(frozen=True)
class Sellmeier(Medium):
    """Sellmeier medium ``n^2 - 1 = sum_i B_i lambda^2 / (lambda^2 - C_i)``, lambda in um.

    Parameters
    ----------
    B : sequence of float
        Dimensionless oscillator strengths.
    C : sequence of float
        Resonance wavelengths squared, um^2 (same length as ``B``).
    valid_nm : (float, float), optional
        Validity range in nm; unrestricted unless given.
    extrapolate : bool
        Warn instead of raising outside ``valid_nm``.
    name, source : str
        Label and citation shown in messages.
    """

    B: tuple
    C: tuple
    valid_nm: tuple = (0.0, math.inf)
    extrapolate: bool = False
    name: str = "sellmeier"
    source: str = "user-given"

    def __post_init__(self):
        b = np.atleast_1d(np.asarray(self.B, dtype=float))
        c = np.atleast_1d(np.asarray(self.C, dtype=float))
        if b.ndim != 1 or b.shape != c.shape or b.size == 0:
            raise InputError("Sellmeier B and C must be equally long 1-D sequences", field="B, C",
                             expected="equal lengths >= 1", found=f"{b.shape} and {c.shape}")
        if not (np.all(np.isfinite(b)) and np.all(np.isfinite(c))):
            raise InputError("Sellmeier coefficients must be finite", field="B, C",
                             expected="finite numbers", found=f"B={b.tolist()}, C={c.tolist()}")
        object.__setattr__(self, "B", tuple(b.tolist()))
        object.__setattr__(self, "C", tuple(c.tolist()))
        object.__setattr__(self, "valid_nm", _valid_range("valid_nm", self.valid_nm))

    def _index_um(self, lam_um):
        b, c = np.asarray(self.B), np.asarray(self.C)
        lam2 = lam_um[..., None] ** 2
        n2 = 1.0 + np.sum(b * lam2 / (lam2 - c), axis=-1)
        return np.where(n2 > 0, np.sqrt(np.abs(n2)), np.nan)

    def _dindex_um(self, lam_um):
        b, c = np.asarray(self.B), np.asarray(self.C)
        lam = lam_um[..., None]
        dn2 = np.sum(-2.0 * b * c * lam / (lam**2 - c) ** 2, axis=-1)
        return dn2 / (2.0 * self._index_um(lam_um))


@dataclass(frozen=True)
class Cauchy(Medium):
    """Cauchy medium ``n = A + B/lambda^2 + C/lambda^4``, lambda in um.

    Parameters
    ----------
    A : float
        Dimensionless constant term.
    B : float
        um^2.
    C : float
        um^4.
    valid_nm, extrapolate, name, source
        As for :class:`Sellmeier`.
    """

    A: float
    B: float = 0.0
    C: float = 0.0
    valid_nm: tuple = (0.0, math.inf)
    extrapolate: bool = False
    name: str = "cauchy"
    source: str = "user-given"

    def __post_init__(self):
        for key in ("A", "B", "C"):
            value = getattr(self, key)
            if not np.isfinite(float(value)):
                raise InputError("Cauchy coefficient must be finite", field=key,
                                 expected="finite number", found=repr(value))
            object.__setattr__(self, key, float(value))
        object.__setattr__(self, "valid_nm", _valid_range("valid_nm", self.valid_nm))

    def _index_um(self, lam_um):
        return self.A + self.B / lam_um**2 + self.C / lam_um**4

    def _dindex_um(self, lam_um):
        return -2.0 * self.B / lam_um**3 - 4.0 * self.C / lam_um**5


@dataclass(frozen=True)
class PowerSeriesMedium(Medium):
    """Medium with ``n^2 = sum_k a_k lambda^(p_k)`` (lambda in um), e.g. Kasarova et al. 2007.

    Parameters
    ----------
    coefficients : sequence of float
        a_k.
    powers : sequence of float
        p_k (same length).
    valid_nm, extrapolate, name, source
        As for :class:`Sellmeier`.
    """

    coefficients: tuple
    powers: tuple
    valid_nm: tuple = (0.0, math.inf)
    extrapolate: bool = False
    name: str = "power-series"
    source: str = "user-given"

    def __post_init__(self):
        a = np.atleast_1d(np.asarray(self.coefficients, dtype=float))
        p = np.atleast_1d(np.asarray(self.powers, dtype=float))
        if a.ndim != 1 or a.shape != p.shape or a.size == 0 or not np.all(np.isfinite(a)):
            raise InputError("coefficients and powers must be equally long finite sequences",
                             field="coefficients, powers", expected="equal lengths >= 1",
                             found=f"{a.shape} and {p.shape}")
        object.__setattr__(self, "coefficients", tuple(a.tolist()))
        object.__setattr__(self, "powers", tuple(p.tolist()))
        object.__setattr__(self, "valid_nm", _valid_range("valid_nm", self.valid_nm))

    def _index_um(self, lam_um):
        a, p = np.asarray(self.coefficients), np.asarray(self.powers)
        n2 = np.sum(a * lam_um[..., None] ** p, axis=-1)
        return np.where(n2 > 0, np.sqrt(np.abs(n2)), np.nan)

    def _dindex_um(self, lam_um):
        a, p = np.asarray(self.coefficients), np.asarray(self.powers)
        dn2 = np.sum(a * p * lam_um[..., None] ** (p - 1.0), axis=-1)
        return dn2 / (2.0 * self._index_um(lam_um))


# --- water: IAPWS R9-97 ---------------------------------------------------------------------

# Harvey, Gallagher & Levelt Sengers (1998), J. Phys. Chem. Ref. Data 27, 761 (IAPWS R9-97).
_IAPWS_A = (0.244257733, 9.74634476e-3, -3.73234996e-3, 2.68678472e-4, 1.58920570e-3,
            2.45934259e-3, 0.900704920, -1.66626219e-2)
_IAPWS_LUV = 0.2292020
_IAPWS_LIR = 5.432937
_IAPWS_T_RANGE_C = (-12.0, 500.0)
_IAPWS_RHO_RANGE = (0.0, 1060.0)

# Tanaka et al. (2001), Metrologia 38, 301: air-free water at 0.101325 MPa, 0-40 degC (ITS-90).
# rho = a5 [1 - (t + a1)^2 (t + a2) / (a3 (t + a4))].  Coefficients from memory; they agree
# with IAPWS-95 at 20, 25, 37 degC within 0.001 kg/m^3 (tests/cavity/test_cavity_media.py).
_TANAKA = (-3.983035, 301.797, 522528.9, 69.34881, 999.974950)
_TANAKA_RANGE_C = (0.0, 40.0)


def water_density_kg_m3(temperature_c):
    """Density of air-free liquid water at 0.101325 MPa (Tanaka et al. 2001), 0-40 degC.

    Parameters
    ----------
    temperature_c : float or array_like
        Temperature in degC (ITS-90).

    Returns
    -------
    float or ndarray
        Density in kg/m^3.
    """
    t = np.asarray(temperature_c, dtype=float)
    lo, hi = _TANAKA_RANGE_C
    if not np.all(np.isfinite(t)) or np.any((t < lo) | (t > hi)):
        raise InputError("the water density correlation (Tanaka et al. 2001) covers 0-40 degC;"
                         " give density_kg_m3 explicitly (e.g. from IAPWS-95) outside it",
                         field="temperature_c", expected=f"{lo:g}-{hi:g} degC",
                         found=f"{t.ravel().tolist()[:3]}")
    a1, a2, a3, a4, a5 = _TANAKA
    rho = a5 * (1.0 - (t + a1) ** 2 * (t + a2) / (a3 * (t + a4)))
    return float(rho) if rho.ndim == 0 else rho


@dataclass(frozen=True)
class WaterIAPWS(Medium):
    """Liquid or gaseous water, IAPWS R9-97 (Harvey, Gallagher & Levelt Sengers 1998).

    Parameters
    ----------
    temperature_c : float
        Temperature in degC (-12 to 500).
    density_kg_m3 : float, optional
        Density (0-1060 kg/m^3).  By default from :func:`water_density_kg_m3`
        (0.101325 MPa, 0-40 degC only).
    extrapolate : bool
        Warn instead of raising outside 200-1100 nm.
    """

    temperature_c: float = 20.0
    density_kg_m3: float | None = None
    extrapolate: bool = False
    valid_nm: tuple = field(default=(200.0, 1100.0), init=False)
    name: str = field(default="water-iapws", init=False)
    source: str = field(default="IAPWS R9-97; Harvey, Gallagher & Levelt Sengers 1998, "
                                "J. Phys. Chem. Ref. Data 27, 761", init=False)

    def __post_init__(self):
        t = float(self.temperature_c)
        lo, hi = _IAPWS_T_RANGE_C
        if not (np.isfinite(t) and lo <= t <= hi):
            raise InputError("temperature outside the IAPWS R9-97 range", field="temperature_c",
                             expected=f"{lo:g} to {hi:g} degC", found=f"{t:g} degC")
        object.__setattr__(self, "temperature_c", t)
        rho = water_density_kg_m3(t) if self.density_kg_m3 is None else float(self.density_kg_m3)
        rlo, rhi = _IAPWS_RHO_RANGE
        if not (np.isfinite(rho) and rlo < rho <= rhi):
            raise InputError("density outside the IAPWS R9-97 range", field="density_kg_m3",
                             expected=f"{rlo:g} to {rhi:g} kg/m^3", found=f"{rho:g} kg/m^3")
        object.__setattr__(self, "density_kg_m3", rho)

    def _a_of(self, lam_um):
        a0, a1, a2, a3, a4, a5, a6, a7 = _IAPWS_A
        rho = self.density_kg_m3 / 1000.0
        tt = (self.temperature_c + 273.15) / 273.15
        lb2 = (lam_um / 0.589) ** 2
        per_rho = (a0 + a1 * rho + a2 * tt + a3 * lb2 * tt + a4 / lb2
                   + a5 / (lb2 - _IAPWS_LUV**2) + a6 / (lb2 - _IAPWS_LIR**2) + a7 * rho**2)
        return rho * per_rho

    def _index_um(self, lam_um):
        a = self._a_of(lam_um)
        return np.sqrt((1.0 + 2.0 * a) / (1.0 - a))

    def _dindex_um(self, lam_um):
        _, _, _, a3, a4, a5, a6, _ = _IAPWS_A
        rho = self.density_kg_m3 / 1000.0
        tt = (self.temperature_c + 273.15) / 273.15
        lb = lam_um / 0.589
        lb2 = lb**2
        da_dlb = rho * (2 * a3 * lb * tt - 2 * a4 / lb**3 - 2 * a5 * lb / (lb2 - _IAPWS_LUV**2) ** 2
                        - 2 * a6 * lb / (lb2 - _IAPWS_LIR**2) ** 2)
        a = self._a_of(lam_um)
        dn_da = 3.0 / (2.0 * self._index_um(lam_um) * (1.0 - a) ** 2)
        return dn_da * da_dlb / 0.589


# --- named media ----------------------------------------------------------------------------

_DAIMON = dict(B=(5.684027565e-1, 1.726177391e-1, 2.086189578e-2, 1.130748688e-1),
               C=(5.101829712e-3, 1.821153936e-2, 2.620722293e-2, 1.069792721e1),
               valid_nm=(182.0, 1129.0), name="water-daimon",
               source="Daimon & Masumura 2007, Appl. Opt. 46, 3811 (20.0 degC)")
_PS_SULTANOVA = dict(B=(1.4435,), C=(0.020216,), valid_nm=(436.8, 1052.0), name="ps-sultanova",
                     source="Sultanova, Kasarova & Nikolov 2009, Acta Phys. Pol. A 116, 585")
_PMMA_SULTANOVA = dict(B=(1.1819,), C=(0.011313,), valid_nm=(436.8, 1052.0),
                       name="pmma-sultanova",
                       source="Sultanova, Kasarova & Nikolov 2009, Acta Phys. Pol. A 116, 585")
# Ma et al. 2003 give n = 1.5725 + 3108/lambda^2 + 3.4779e8/lambda^4 with lambda in nm.
_PS_MA = dict(A=1.5725, B=3108.0e-6, C=3.4779e8 * 1e-12, valid_nm=(390.0, 1310.0), name="ps-ma",
              source="Ma et al. 2003, Phys. Med. Biol. 48, 4165 (polystyrene microspheres)")
_PMMA_KASAROVA = dict(coefficients=(2.399964, -8.308636e-2, -1.919569e-1, 8.720608e-2,
                                    -1.666411e-2, 1.169519e-3),
                      powers=(0.0, 2.0, -2.0, -4.0, -6.0, -8.0), valid_nm=(435.8, 1052.0),
                      name="pmma-kasarova", source="Kasarova et al. 2007, Opt. Mater. 29, 1481 (20 degC)")

# name -> (factory, reference temperature in degC or None if the formula has no temperature)
_NAMED = {
    "water-iapws": (None, None),
    "water-daimon": (lambda ex: Sellmeier(**_DAIMON, extrapolate=ex), 20.0),
    "ps-sultanova": (lambda ex: Sellmeier(**_PS_SULTANOVA, extrapolate=ex), None),
    "ps-ma": (lambda ex: Cauchy(**_PS_MA, extrapolate=ex), None),
    "pmma-sultanova": (lambda ex: Sellmeier(**_PMMA_SULTANOVA, extrapolate=ex), None),
    "pmma-kasarova": (lambda ex: PowerSeriesMedium(**_PMMA_KASAROVA, extrapolate=ex), 20.0),
}

#: Names accepted by :func:`get_medium`.
MEDIA = tuple(_NAMED)


def get_medium(name, *, temperature_c=None, density_kg_m3=None, extrapolate=False):
    """A named medium (see :data:`MEDIA` and the module docstring).

    Parameters
    ----------
    name : str
        One of :data:`MEDIA`.
    temperature_c : float, optional
        Temperature in degC.  ``water-iapws`` uses it (default 20 degC); formulas
        given at one temperature accept only that value; the others accept none.
    density_kg_m3 : float, optional
        Water density for ``water-iapws`` (default: Tanaka et al. 2001 correlation).
    extrapolate : bool
        Warn (FitWarning) instead of raising InputError outside the validity range.

    Returns
    -------
    Medium
    """
    key = str(name).strip().lower()
    if key not in _NAMED:
        raise InputError("unknown medium", field="name", expected=f"one of {', '.join(MEDIA)}",
                         found=repr(name))
    if key == "water-iapws":
        t = 20.0 if temperature_c is None else temperature_c
        return WaterIAPWS(temperature_c=t, density_kg_m3=density_kg_m3, extrapolate=bool(extrapolate))
    if density_kg_m3 is not None:
        raise InputError(f"medium '{key}' takes no density", field="density_kg_m3",
                         expected="None", found=repr(density_kg_m3))
    factory, t_ref = _NAMED[key]
    if temperature_c is not None and (t_ref is None or float(temperature_c) != t_ref):
        raise InputError(f"medium '{key}' has no temperature dependence",
                         field="temperature_c",
                         expected="None" if t_ref is None else f"None or {t_ref:g} degC",
                         found=f"{temperature_c!r} degC")
    return factory(bool(extrapolate))
