"""Pump dose per pulse: fluence, peak irradiance, photons, and the skin MPE for reference.

:func:`pulse_dose` turns a pulse energy, duration and spot into fluence (J/cm^2; the peak
fluence for a Gaussian spot), peak irradiance (W/cm^2) for a square and for a Gaussian
temporal pulse, and photons per pulse, and compares the fluence with the skin maximum
permissible exposure (MPE) of ANSI Z136.1 / IEC 60825-1 where this module has a value
(400-700 nm, 1 ns - 10 s).  Every printed result carries :data:`CAUTIONS`.

Formulas: top-hat of diameter D, F = E / (pi D^2 / 4); Gaussian spot of 1/e^2 radius w,
peak F0 = 2 E / (pi w^2); square pulse I = F / tau; Gaussian pulse of FWHM tau,
I_peak = 2 sqrt(ln 2 / pi) F / tau = 0.9394 F / tau; photons E lambda / (h c).
Skin MPE (C_A = 1 below 700 nm): 2 C_A 1e-2 J/cm^2 for 1e-9 to 1e-7 s, 1.1 C_A t^0.25
J/cm^2 for 1e-7 to 10 s.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

from .exceptions import InputError, LasecytoWarning

__all__ = ["CAUTIONS", "PulseDose", "pulse_dose", "skin_mpe_j_cm2"]

_H_J_S = 6.62607015e-34
_C_M_S = 299792458.0
_GAUSS_PULSE = 2.0 * math.sqrt(math.log(2.0) / math.pi)

CAUTIONS = """\
CAUTIONS (pump lasers)
- ns-pulsed visible pump lasers delivering nJ-uJ per pulse are Class 3B or Class 4 lasers:
  direct and specularly reflected beams can injure the eye instantly and Class 4 beams can
  burn skin.
- Wear eyewear rated for the pump wavelength (optical density for that wavelength), enclose
  the beam path, and use interlocks on microscope and enclosure covers.
- The MPE values quoted here come from ANSI Z136.1 / IEC 60825-1 (skin, single pulse) and
  are limits for accidental exposure of humans, not doses for cells; repetition-rate
  corrections lower the per-pulse MPE of pulse trains, and the eye MPE is far lower than
  the skin MPE.
- This is not a safety assessment. Follow your local rules and defer to your institution's
  laser safety officer."""


def _positive(name, value):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError("must be a number", field=name, expected="positive number",
                         found=repr(value)) from None
    if not (math.isfinite(v) and v > 0):
        raise InputError("must be positive and finite", field=name, expected="> 0", found=repr(value))
    return v


def skin_mpe_j_cm2(wavelength_nm, pulse_s):
    """Single-pulse skin MPE (J/cm^2) of ANSI Z136.1 / IEC 60825-1, or None with a reason.

    Parameters
    ----------
    wavelength_nm : float
        Wavelength; values are given here for 400-700 nm only (C_A = 1).
    pulse_s : float
        Exposure (pulse) duration; 1e-9 to 10 s.

    Returns
    -------
    mpe : float or None
        None when this module gives no value.
    note : str
        Which rule applied, or why there is no value.
    """
    lam = _positive("wavelength_nm", wavelength_nm)
    t = _positive("pulse_s", pulse_s)
    if not 400.0 <= lam < 700.0:
        return None, (f"no skin MPE given here for {lam:g} nm (only 400-700 nm, C_A = 1); "
                      "consult ANSI Z136.1 / IEC 60825-1")
    c_a = 1.0
    if 1e-9 <= t < 1e-7:
        return 2.0 * c_a * 1e-2, "skin MPE 2 C_A 1e-2 J/cm^2 (1e-9 to 1e-7 s, C_A = 1)"
    if 1e-7 <= t <= 10.0:
        return 1.1 * c_a * t**0.25, "skin MPE 1.1 C_A t^0.25 J/cm^2 (1e-7 to 10 s, C_A = 1)"
    return None, (f"no skin MPE given here for a {t:g} s exposure (only 1e-9 to 10 s); "
                  "consult ANSI Z136.1 / IEC 60825-1")


@dataclass(frozen=True)
class PulseDose:
    """Dose of one pump pulse (see :func:`pulse_dose`); ``str()`` includes the cautions.

    Attributes
    ----------
    energy_j, pulse_s, wavelength_nm : float
        Inputs.
    beam : str
        'tophat' or 'gaussian'.
    spot : str
        Spot description (diameter or 1/e^2 radius).
    fluence_j_cm2 : float
        Fluence (peak fluence for a Gaussian spot).
    peak_irradiance_square_w_cm2 : float
        fluence / pulse_s (square pulse of duration pulse_s).
    peak_irradiance_gaussian_w_cm2 : float
        0.9394 fluence / pulse_s (Gaussian pulse of FWHM pulse_s).
    photons : float
        Photons per pulse.
    skin_mpe_j_cm2 : float or None
        Skin MPE for this wavelength and duration; None where none is given here.
    mpe_ratio : float or None
        fluence / skin MPE.
    mpe_note : str
        Rule used or why there is no value.
    """

    energy_j: float
    pulse_s: float
    wavelength_nm: float
    beam: str
    spot: str
    fluence_j_cm2: float
    peak_irradiance_square_w_cm2: float
    peak_irradiance_gaussian_w_cm2: float
    photons: float
    skin_mpe_j_cm2: float | None
    mpe_ratio: float | None
    mpe_note: str

    def __str__(self):
        lines = [
            f"Pump pulse: {self.energy_j:.4g} J, {self.pulse_s:.4g} s, {self.wavelength_nm:g} nm, "
            f"{self.beam} spot ({self.spot})",
            f"  fluence{' (peak)' if self.beam == 'gaussian' else ''}: {self.fluence_j_cm2:.4g} J/cm^2",
            f"  peak irradiance: {self.peak_irradiance_square_w_cm2:.3g} W/cm^2 (square pulse), "
            f"{self.peak_irradiance_gaussian_w_cm2:.3g} W/cm^2 (Gaussian pulse, FWHM)",
            f"  photons per pulse: {self.photons:.4g}",
        ]
        if self.skin_mpe_j_cm2 is None:
            lines.append(f"  skin MPE: none ({self.mpe_note})")
        else:
            lines.append(f"  skin MPE: {self.skin_mpe_j_cm2:.4g} J/cm^2 ({self.mpe_note}); "
                         f"fluence = {self.mpe_ratio:.3g} x skin MPE")
        return "\n".join(lines) + "\n\n" + CAUTIONS


def pulse_dose(energy_j, *, pulse_s, beam="tophat", diameter_um=None, w_um=None, wavelength_nm,
               warn_fraction=None):
    """Fluence, peak irradiance, photons and skin-MPE ratio of one pump pulse.

    Parameters
    ----------
    energy_j : float
        Pulse energy in J.
    pulse_s : float
        Pulse duration (square) or FWHM (Gaussian) in s.
    beam : {'tophat', 'gaussian'}
        Spatial profile.
    diameter_um : float, optional
        Top-hat diameter; for a Gaussian beam the 1/e^2 diameter (= 2 w).
    w_um : float, optional
        Gaussian 1/e^2 intensity radius.
    wavelength_nm : float
        Pump wavelength.
    warn_fraction : float, optional
        Warn (LasecytoWarning) when the fluence exceeds this fraction of the skin MPE.

    Returns
    -------
    PulseDose
    """
    e = _positive("energy_j", energy_j)
    t = _positive("pulse_s", pulse_s)
    lam = _positive("wavelength_nm", wavelength_nm)
    kind = str(beam).lower()
    if kind == "tophat":
        if w_um is not None or diameter_um is None:
            raise InputError("a top-hat spot needs diameter_um (and no w_um)", field="diameter_um",
                             expected="diameter_um only", found=f"diameter_um={diameter_um!r}, w_um={w_um!r}")
        d_cm = _positive("diameter_um", diameter_um) * 1e-4
        fluence = e / (math.pi * d_cm**2 / 4.0)
        spot = f"diameter {float(diameter_um):g} um"
    elif kind == "gaussian":
        if (w_um is None) == (diameter_um is None):
            raise InputError("a Gaussian spot needs exactly one of w_um or diameter_um (1/e^2)",
                             field="w_um", expected="one of w_um, diameter_um",
                             found=f"diameter_um={diameter_um!r}, w_um={w_um!r}")
        w = _positive("w_um", w_um) if w_um is not None else _positive("diameter_um", diameter_um) / 2
        w_cm = w * 1e-4
        fluence = 2.0 * e / (math.pi * w_cm**2)
        spot = f"1/e^2 radius {w:g} um"
    else:
        raise InputError("unknown beam profile", field="beam", expected="'tophat' or 'gaussian'",
                         found=repr(beam))
    photons = e * lam * 1e-9 / (_H_J_S * _C_M_S)
    mpe, note = skin_mpe_j_cm2(lam, t)
    ratio = None if mpe is None else fluence / mpe
    if warn_fraction is not None:
        frac = _positive("warn_fraction", warn_fraction)
        if ratio is not None and ratio > frac:
            warnings.warn(f"pump fluence {fluence:.3g} J/cm^2 is {ratio:.3g} x the skin MPE "
                          f"(above the set fraction {frac:g}); see lasecyto.safety.CAUTIONS",
                          LasecytoWarning, stacklevel=2)
    return PulseDose(energy_j=e, pulse_s=t, wavelength_nm=lam, beam=kind, spot=spot,
                     fluence_j_cm2=fluence, peak_irradiance_square_w_cm2=fluence / t,
                     peak_irradiance_gaussian_w_cm2=_GAUSS_PULSE * fluence / t, photons=photons,
                     skin_mpe_j_cm2=mpe, mpe_ratio=ratio, mpe_note=note)
