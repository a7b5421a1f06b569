"""Calibration: air/vacuum conversion, the detector wavelength axis, the dispersion solution
from lamp lines against packaged NIST reference lines, lamp-line identification without a
dispersion guess, the instrument function measured from lamp lines, and the camera noise model
(offset and read noise from dark frames, gain by photon transfer)."""

from ._airvac import AIR_FORMULAS, air_to_vacuum, refractive_index_air, vacuum_to_air
from ._axis import WavelengthAxis
from ._camera import DarkFrameEstimate, PhotonTransfer, dark_frame_estimate, photon_transfer
from ._identify import LineIdentification, calibrate_lamp, identify_lamp_lines
from ._instrument import measure_instrument_profile
from ._lamp import DispersionSolution, find_lamp_peaks, solve_dispersion
from ._reference import REFERENCE_SETS, reference_lines

__all__ = [
    "AIR_FORMULAS",
    "DarkFrameEstimate",
    "PhotonTransfer",
    "DispersionSolution",
    "LineIdentification",
    "REFERENCE_SETS",
    "WavelengthAxis",
    "air_to_vacuum",
    "calibrate_lamp",
    "dark_frame_estimate",
    "find_lamp_peaks",
    "identify_lamp_lines",
    "measure_instrument_profile",
    "photon_transfer",
    "reference_lines",
    "refractive_index_air",
    "solve_dispersion",
    "vacuum_to_air",
]
