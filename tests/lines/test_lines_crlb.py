import pytest

from lasecyto.lines import crlb_center_px

# check-values.md section 8 (CRLB worked example, computed there from the Fisher information of the
# pixel-integrated model): Lorentzian FWHM 0.05 nm on 0.02 nm pixels (2.5 px), N = 1e4 photons,
# b = 10 photons/pixel, 250 pixels.  1 px = 20 pm.  Tolerance 0.5 %.
#
# Placement: with this package's convention (pixel i covers [i - 0.5, i + 0.5]) the value the table
# lists as "line on pixel centre" (0.3704 pm) belongs to a line on a pixel EDGE and the "pixel edge"
# value (0.3734 pm) to a line on a pixel CENTRE; an independent brute-force integration agrees
# (a line centred on a pixel puts the flat top of the profile in one pixel, which carries no
# centre information).  The table's column labels are swapped relative to our grid.
PM_PER_PX = 20.0


@pytest.mark.parametrize("center, read_noise, expected_pm", [
    (125.5, 0.0, 0.3704),   # table: "pixel centre", 0 e
    (125.25, 0.0, 0.3719),  # table: 1/4-pixel offset, 0 e
    (125.0, 0.0, 0.3734),   # table: "pixel edge", 0 e
    (125.5, 3.0, 0.3726),
    (125.5, 10.0, 0.3917),
    (125.0, 10.0, 0.3954),
])
def test_worked_example(center, read_noise, expected_pm):
    bound_px = crlb_center_px(center, 2.5, 1e4, 10.0, n_pixels=250, read_noise_e=read_noise)
    assert bound_px * PM_PER_PX == pytest.approx(expected_pm, rel=5e-3)


def test_joint_equals_single_parameter_here():
    # section 8: joint CRLB equals the 1-parameter value to 4 digits for these placements
    joint = crlb_center_px(125.5, 2.5, 1e4, 10.0, n_pixels=250)
    single = crlb_center_px(125.5, 2.5, 1e4, 10.0, n_pixels=250, joint=False)
    assert joint == pytest.approx(single, rel=1e-4)
    assert joint >= single


def test_gaussian_reference():
    # section 8: Gaussian of the same FWHM with b = 10: 0.2235 pm (tolerance 0.5 %)
    bound = crlb_center_px(125.5, 2.5, 1e4, 10.0, n_pixels=250, shape="gaussian")
    assert bound * PM_PER_PX == pytest.approx(0.2235, rel=5e-3)
