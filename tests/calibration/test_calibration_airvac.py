"""Air <-> vacuum conversion against NIST pairs and computed check values."""

import numpy as np
import pytest

from lasecyto.calibration import AIR_FORMULAS, air_to_vacuum, vacuum_to_air
from lasecyto.exceptions import InputError

FORMULAS = ["morton2000", "ciddor1996", "edlen1966", "peck_reeder1972"]

# check-values.md section 1c / 2: vacuum counterparts in the NIST ASD lines export (Oct 2015)
NIST_PAIRS = [
    (585.24878, 585.41101),   # Ne I
    (640.2248, 640.4018),     # Ne I
    (811.5311, 811.7542),     # Ar I
    (546.0750, 546.2268),     # Hg I
]

# check-values.md section 2, "Check pairs [C]", Morton 2000 column (computed from the formula)
MORTON_COMPUTED = [
    (585.24878, 585.41102),
    (640.2248, 640.40178),
    (811.5311, 811.75425),
    (546.0750, 546.22676),
]


def test_all_four_formulas_are_known():
    assert set(FORMULAS) == set(AIR_FORMULAS)


@pytest.mark.parametrize("formula", FORMULAS)
@pytest.mark.parametrize("air_nm, vac_nm", NIST_PAIRS)
def test_air_to_vacuum_reproduces_nist_pairs(formula, air_nm, vac_nm):
    # check-values.md section 2 (NIST ASD air/vacuum pairs); tolerance 2e-4 nm for any formula
    assert abs(float(air_to_vacuum(air_nm, formula=formula)) - vac_nm) <= 2e-4


@pytest.mark.parametrize("air_nm, vac_nm", MORTON_COMPUTED)
def test_morton_gives_computed_values(air_nm, vac_nm):
    # check-values.md section 2 "Check pairs [C]", Morton 2000; tolerance 1e-5 nm (rounding of the table)
    assert abs(float(air_to_vacuum(air_nm)) - vac_nm) <= 1e-5
    assert abs(float(air_to_vacuum(air_nm, formula="morton2000")) - vac_nm) <= 1e-5


@pytest.mark.parametrize("formula", ["ciddor1996", "morton2000"])
def test_vacuum_to_air_633(formula):
    # check-values.md section 2: 633.000 nm vac -> 632.82500 nm air (Ciddor; Morton equal); tolerance 1e-5 nm
    assert abs(float(vacuum_to_air(633.000, formula=formula)) - 632.82500) <= 1e-5


@pytest.mark.parametrize("formula", FORMULAS)
def test_round_trip_air_vacuum_air(formula):
    # check-values.md section 2 "Test use": round trip within 1e-6 nm
    air = np.linspace(200.0, 2000.0, 181)
    back = vacuum_to_air(air_to_vacuum(air, formula=formula), formula=formula)
    assert np.max(np.abs(back - air)) <= 1e-6


def test_unknown_formula_is_an_input_error():
    with pytest.raises(InputError, match="formula"):
        air_to_vacuum(600.0, formula="nonsense")
