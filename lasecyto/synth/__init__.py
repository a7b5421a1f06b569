"""Physically based synthetic experiments with ground truth (demo and tests).

Everything this subpackage writes is synthetic.  It keeps its own physics (water
dispersion of Daimon & Masumura 2007, Ciddor 1996 standard air, exact Fabry-Perot
resonances, complex-root bead resonances, rate-equation pump series, pixel-integrated
line shapes, camera noise) and imports none of the
analysis subpackages it is used to test.

write_fp_experiment   a whole experiment: manifest, stacks, sidecars, lamp, camera images and truth/
write_pattern_experiment  an image-only experiment (emission-pattern stacks, no spectra) and truth/
write_sphere_experiment  dye-doped bead (whispering-gallery) lasers in cells: a medium-shift time-lapse
write_pump_experiment    a pump-threshold series of bead lasers (rate-equation S-curves, known threshold)
wgm_resonances        exact (complex-root) bead resonances and radiation-limited Q, own solver
tile_experiment       a large experiment reusing the stacks of a few generated cells
render_lamp_frame     one neon (or any line-lamp) frame through a known wavelength axis
neon_lines_air_nm     Ne I air wavelengths 530-725 nm (NIST ASD)
neon_relative_intensities  their NIST relative intensities
fp_mode_wavelengths   exact resonances of a dispersive Fabry-Perot gap
mode_trajectories     a drifting mode comb with crossings, dropouts, hops and true identities
water_index_daimon    refractive index of water at 20 degC
camera_frames         frames of a steady scene through a known camera (offset, gain, read noise)
slit_line_photons     narrow lines through a slit-image instrument function (optionally asymmetric)
add_cosmic_rays       single-pixel cosmic-ray hits added to frames
"""

from ._camera import add_cosmic_rays, camera_frames, slit_line_photons
from ._experiment import write_fp_experiment, write_pattern_experiment
from ._media import water_index_daimon
from ._modes import fp_mode_wavelengths
from ._neon import neon_lines_air_nm, neon_relative_intensities
from ._pump_scenario import write_pump_experiment
from ._render import render_lamp_frame
from ._sphere_scenario import write_sphere_experiment
from ._tile import tile_experiment
from ._trajectories import TRAJECTORY_SCENARIO, mode_trajectories
from ._wgm import wgm_resonances

__all__ = [
    "write_fp_experiment",
    "write_pattern_experiment",
    "write_sphere_experiment",
    "write_pump_experiment",
    "wgm_resonances",
    "tile_experiment",
    "render_lamp_frame",
    "neon_lines_air_nm",
    "neon_relative_intensities",
    "fp_mode_wavelengths",
    "water_index_daimon",
    "mode_trajectories",
    "TRAJECTORY_SCENARIO",
    "camera_frames",
    "slit_line_photons",
    "add_cosmic_rays",
]
