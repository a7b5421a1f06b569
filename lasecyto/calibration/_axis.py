"""The wavelength axis of a detector: pixel index to vacuum wavelength."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..exceptions import InputError
from ._airvac import air_to_vacuum

__all__ = ["WavelengthAxis"]


@dataclass(frozen=True)
class WavelengthAxis:
    """Pixel-to-wavelength map of a spectrometer.

    Exactly one of ``polynomial_nm`` and ``values_nm`` is given.

    Parameters
    ----------
    polynomial_nm : tuple of float, optional
        Coefficients c_k, ascending, of lambda(p) = sum_k c_k p**k in nm, where
        p is the pixel index counted from 0 (pixel centres are integers).
    values_nm : array, optional
        Explicit wavelength of every pixel centre (monotonic).
    medium : {"air", "vacuum"}
        Whether the wavelengths are in standard air or in vacuum.
    """

    polynomial_nm: tuple | None = None
    values_nm: tuple | None = None
    medium: str = "air"

    def __post_init__(self):
        if (self.polynomial_nm is None) == (self.values_nm is None):
            raise InputError("give exactly one of polynomial_nm and values_nm",
                             field="wavelength", expected="one of the two", found="both or neither")
        if self.medium not in ("air", "vacuum"):
            raise InputError("unknown medium", field="wavelength.medium",
                             expected="'air' or 'vacuum'", found=repr(self.medium))
        if self.polynomial_nm is not None:
            object.__setattr__(self, "polynomial_nm", tuple(float(c) for c in self.polynomial_nm))
        else:
            v = np.asarray(self.values_nm, dtype=float)
            if v.ndim != 1 or v.size < 2 or not np.all(np.isfinite(v)):
                raise InputError("explicit axis must be a finite 1-D list", field="wavelength.values_nm",
                                 expected="at least 2 finite values", found=f"shape {v.shape}")
            d = np.diff(v)
            if not (np.all(d > 0) or np.all(d < 0)):
                raise InputError("explicit axis is not monotonic", field="wavelength.values_nm",
                                 expected="strictly increasing or decreasing values",
                                 found="a change of direction")
            object.__setattr__(self, "values_nm", tuple(v.tolist()))

    @property
    def n_pixels(self):
        """Number of pixels of an explicit axis (None for a polynomial)."""
        return None if self.values_nm is None else len(self.values_nm)

    def native_nm(self, pixel):
        """Wavelength in the axis' own medium at (fractional) pixel positions."""
        p = np.asarray(pixel, dtype=float)
        if self.polynomial_nm is not None:
            return np.polynomial.polynomial.polyval(p, self.polynomial_nm)
        v = np.asarray(self.values_nm)
        return np.interp(p, np.arange(v.size), v, left=np.nan, right=np.nan)

    def vacuum_nm(self, pixel):
        """Vacuum wavelength at (fractional) pixel positions."""
        lam = self.native_nm(pixel)
        return air_to_vacuum(lam) if self.medium == "air" else lam

    def vacuum_dispersion_nm_per_px(self, pixel):
        """d(lambda_vacuum)/d(pixel) at (fractional) pixel positions."""
        p = np.asarray(pixel, dtype=float)
        h = 1e-3
        return (self.vacuum_nm(p + h) - self.vacuum_nm(p - h)) / (2 * h)
