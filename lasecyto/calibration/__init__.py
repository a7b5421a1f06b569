"""Wavelength calibration: air/vacuum conversion and the detector wavelength axis."""

from ._airvac import AIR_FORMULAS, air_to_vacuum, refractive_index_air, vacuum_to_air
from ._axis import WavelengthAxis

__all__ = [
    "AIR_FORMULAS",
    "WavelengthAxis",
    "air_to_vacuum",
    "refractive_index_air",
    "vacuum_to_air",
]
