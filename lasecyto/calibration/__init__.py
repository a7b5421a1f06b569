"""Wavelength calibration: air/vacuum conversion, the detector wavelength axis, the
dispersion solution from lamp lines against packaged NIST reference lines, and lamp-line
identification without a dispersion guess."""

from ._airvac import AIR_FORMULAS, air_to_vacuum, refractive_index_air, vacuum_to_air
from ._axis import WavelengthAxis
from ._identify import LineIdentification, calibrate_lamp, identify_lamp_lines
from ._lamp import DispersionSolution, find_lamp_peaks, solve_dispersion
from ._reference import REFERENCE_SETS, reference_lines

__all__ = [
    "AIR_FORMULAS",
    "DispersionSolution",
    "LineIdentification",
    "REFERENCE_SETS",
    "WavelengthAxis",
    "air_to_vacuum",
    "calibrate_lamp",
    "find_lamp_peaks",
    "identify_lamp_lines",
    "reference_lines",
    "refractive_index_air",
    "solve_dispersion",
    "vacuum_to_air",
]
