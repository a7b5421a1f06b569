"""Neon (Ne I) lamp lines used to render synthetic calibration frames."""

from __future__ import annotations

import numpy as np

__all__ = ["neon_lines_air_nm", "neon_relative_intensities"]

# Ne I, 530-725 nm: observed air wavelengths (nm) and NIST relative intensities.
# Source: NIST Atomic Spectra Database (Kramida, Ralchenko, Reader and NIST ASD Team),
# lines export of Oct 2015; Ne I data derive mainly from Saloman & Sansonetti (2004),
# J. Phys. Chem. Ref. Data 33, 1113.  Relative intensities depend on lamp type and
# current; here they only set the relative brightness of the rendered lines.
# 597.46273 nm (int. 5000) is the partner of 597.55343 nm, 0.091 nm apart, quoted in the
# text beside the same NIST table: a real lamp shows the two as one blended line.
_NE_I_AIR = (
    (533.07775, 6000),
    (534.10938, 10000),
    (540.05616, 20000),
    (585.24878, 20000),
    (588.18950, 10000),
    (594.48340, 5000),
    (597.46273, 5000),
    (597.55343, 6000),
    (602.99968, 10000),
    (607.43376, 10000),
    (609.61630, 3000),
    (614.30627, 10000),
    (616.35937, 10000),
    (621.72812, 10000),
    (626.64952, 10000),
    (630.47893, 1000),
    (633.44276, 10000),
    (638.29914, 10000),
    (640.22480, 20000),
    (650.65277, 15000),
    (653.28824, 1000),
    (659.89528, 10000),
    (667.82766, 5000),
    (671.70430, 700),
    (692.94672, 100000),
    (702.40500, 34000),
    (703.24128, 85000),
    (717.39380, 77000),
    (724.51665, 77000),
)


def neon_lines_air_nm():
    """Ne I lamp lines between 530 and 725 nm, air wavelengths (NIST ASD).

    Includes the close pair 597.46273 / 597.55343 nm, which blends at the resolution
    of a typical cell-laser spectrometer.

    Returns
    -------
    ndarray
        29 observed air wavelengths in nm, increasing.

    See Also
    --------
    neon_relative_intensities : the matching NIST relative intensities.
    """
    return np.array([w for w, _ in _NE_I_AIR], dtype=float)


def neon_relative_intensities():
    """NIST relative intensities of the lines of :func:`neon_lines_air_nm`, same order."""
    return np.array([i for _, i in _NE_I_AIR], dtype=float)
