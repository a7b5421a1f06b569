"""Packaged lamp reference lines reproduce the NIST ASD tables."""

from importlib import resources

import numpy as np
import pytest

from lasecyto.calibration import REFERENCE_SETS, reference_lines
from lasecyto.exceptions import InputError


def _row(df, wavelength_nm):
    hit = df[np.isclose(df["wavelength_air_nm"], wavelength_nm, rtol=0, atol=1e-9)]
    assert len(hit) == 1, f"{wavelength_nm} nm not found exactly once"
    return hit.iloc[0]


def test_columns_and_sizes():
    for name, n in [("Ne I", 29), ("Hg I", 10), ("Ar I", 19)]:
        df = reference_lines(name)
        assert list(df.columns) == ["wavelength_air_nm", "relative_intensity", "note", "species"]
        assert len(df) == n
        assert (df["species"] == name).all()
        assert np.all(np.diff(df["wavelength_air_nm"].to_numpy()) > 0)


@pytest.mark.parametrize("name, wavelength_nm, intensity", [
    # check-values.md section 1a (NIST ASD export Oct 2015, Ne I observed air wavelengths); exact
    ("Ne I", 533.07775, 6000), ("Ne I", 585.24878, 20000), ("Ne I", 640.22480, 20000),
    ("Ne I", 692.94672, 100000), ("Ne I", 724.51665, 77000),
    # check-values.md section 1b, NIST ASD column (Hg I); exact
    ("Hg I", 404.6565, 12000), ("Hg I", 546.0750, 6000), ("Hg I", 579.0670, 900), ("Hg I", 690.746, 1000),
    # check-values.md section 1c (Ar I); exact
    ("Ar I", 696.5431, 10000), ("Ar I", 811.5311, 35000), ("Ar I", 852.1442, 15000),
])
def test_values_reproduce_the_tables(name, wavelength_nm, intensity):
    row = _row(reference_lines(name), wavelength_nm)
    assert row["wavelength_air_nm"] == wavelength_nm
    assert row["relative_intensity"] == intensity


def test_blends_are_marked():
    # check-values.md section 1a: Ne 597.46273 (int. 5000) + 597.55343 (6000), 0.091 nm apart
    ne = reference_lines("Ne I")
    assert _row(ne, 597.46273)["relative_intensity"] == 5000
    for lam in (597.46273, 597.55343):
        assert "blend" in _row(ne, lam)["note"]
    # check-values.md section 1c: Ar 772.3761 + 772.4207
    ar = reference_lines("Ar I")
    for lam in (772.3761, 772.4207):
        assert "blend" in _row(ar, lam)["note"]
    assert (ne["note"].str.contains("blend").sum(), ar["note"].str.contains("blend").sum()) == (2, 2)


def test_combination_is_sorted_and_labelled():
    both = reference_lines("Ne I + Hg I")
    assert len(both) == 39
    assert np.all(np.diff(both["wavelength_air_nm"].to_numpy()) > 0)
    assert set(both["species"]) == {"Ne I", "Hg I"}
    assert _row(both, 546.0750)["species"] == "Hg I"
    assert both.index.equals(reference_lines("hg i+ne  i").index)


def test_unknown_name_lists_known_names():
    with pytest.raises(InputError) as err:
        reference_lines("Kr I")
    for name in REFERENCE_SETS:
        assert name in str(err.value)
    with pytest.raises(InputError):
        reference_lines("Ne I + Xe I")


def test_files_name_their_source():
    for filename in REFERENCE_SETS.values():
        text = resources.files("lasecyto.calibration").joinpath("data", filename).read_text()
        header = [line for line in text.splitlines() if line.startswith("#")]
        assert any("NIST Atomic Spectra Database" in line for line in header)
