"""Atomic writes, JSON, hashes and schema-validated tables through Parquet and CSV."""

import hashlib
import json
import math

import numpy as np
import pandas as pd
import pytest

from lasecyto.exceptions import InputError, SchemaError
from lasecyto.io import atomic_path, file_sha256, read_table, write_json, write_table
from lasecyto.tables import validate


def _cells():
    return pd.DataFrame({
        "cell_id": ["A-01", "A-02", "007"],
        "dish": ["A", "A", "B"],
        "condition": ["control", "control", ""],
        "perturbation_s": [np.nan, np.nan, 300.0],
        "n_frames": [40, 40, 38],
        "n_frames_lasing": [40, 12, 0],
        "n_tracks": [5, 3, 0],
        "baseline_optical_length_um": [27.1, 27.3, np.nan],
        "baseline_noise": [1e-5, 2.5e-5, np.nan],
        "index_change": [1.0 / 3.0, -2e-4, np.nan],
        "index_change_err": [1e-5, 1e-5, np.nan],
        "change_z": [0.5, -8.0, np.nan],
        "onset_s": [np.nan, 320.5, np.nan],
        "onset_err_s": [np.nan, 4.0, np.nan],
        "changed": [False, True, False],
        "note": ["", "onset found", "no lasing"],
        "score": [0.1, 0.9, np.nan],
    })


def test_atomic_failure_keeps_old_file_and_leaves_no_temp(tmp_path):
    target = tmp_path / "out.json"
    target.write_text("old")
    with pytest.raises(RuntimeError):
        with atomic_path(target) as tmp:
            assert tmp.parent == tmp_path and tmp != target
            tmp.write_text("half written")
            raise RuntimeError("disk trouble")
    assert target.read_text() == "old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.json"]


def test_atomic_success_replaces(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old")
    with atomic_path(target) as tmp:
        tmp.write_text("new")
    assert target.read_text() == "new"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.txt"]


def test_write_json_nan_to_null_sorted(tmp_path):
    path = write_json({"b": np.float64("nan"), "a": [1, np.int64(2), math.inf], "p": tmp_path / "x",
                       "arr": np.arange(3)}, tmp_path / "r.json")
    text = path.read_text()
    assert json.loads(text) == {"a": [1, 2, None], "arr": [0, 1, 2], "b": None, "p": str(tmp_path / "x")}
    assert text.index('"a"') < text.index('"arr"') < text.index('"b"')
    assert '\n  "a": [' in text
    with pytest.raises(InputError, match="JSON"):
        write_json({"f": object()}, tmp_path / "bad.json")
    assert not (tmp_path / "bad.json").exists()


def test_file_sha256(tmp_path):
    path = tmp_path / "b.bin"
    payload = bytes(range(256)) * 5000
    path.write_bytes(payload)
    assert file_sha256(path) == hashlib.sha256(payload).hexdigest()


def test_table_round_trip_keeps_dtypes(tmp_path):
    original = validate(_cells(), "cells")
    pq, csv = write_table(_cells(), tmp_path / "tables" / "cells", name="cells")
    assert pq.name == "cells.parquet" and csv.name == "cells.csv"
    for path in (pq, csv):
        back = read_table(path, name="cells")
        assert list(back.columns) == list(original.columns)
        assert dict(back.dtypes) == dict(original.dtypes), path.suffix
        assert isinstance(back.index, pd.RangeIndex)
        pd.testing.assert_frame_equal(back, original, check_exact=True)


def test_write_table_refuses_invalid(tmp_path):
    bad = _cells().drop(columns=["onset_s"])
    with pytest.raises(SchemaError, match="onset_s"):
        write_table(bad, tmp_path / "cells", name="cells")
    assert list(tmp_path.iterdir()) == []


def test_read_table_reports_bad_csv_cell(tmp_path):
    _, csv = write_table(_cells(), tmp_path / "cells", name="cells")
    text = csv.read_text().splitlines()
    text[2] = text[2].replace(",12,", ",twelve,")
    csv.write_text("\n".join(text) + "\n")
    with pytest.raises(SchemaError) as err:
        read_table(csv, name="cells")
    msg = str(err.value)
    assert "cells.csv" in msg and "line 3" in msg and "n_frames_lasing" in msg and "'twelve'" in msg


def test_read_table_bad_suffix_and_missing(tmp_path):
    with pytest.raises(InputError, match="suffix"):
        read_table(tmp_path / "cells.xlsx", name="cells")
    with pytest.raises(InputError, match="not found"):
        read_table(tmp_path / "cells.parquet", name="cells")


def test_columns_with_a_fill_value_may_be_absent(tmp_path):
    # a cells table written before the pattern and flag columns existed still validates: they are added filled
    from lasecyto import tables

    required = [c for c in tables.SCHEMAS["cells"] if c.required and c.fill is None]
    row = {c.name: {"str": "x", "int": 1, "float": 0.5, "bool": False}[c.kind] for c in required}
    df = tables.validate(pd.DataFrame([row]), "cells")
    assert df.loc[0, "pattern_dominant_order"] == "" and np.isnan(df.loc[0, "q_value"])
    assert df.loc[0, "pattern_change_count"] == 0 and not df.loc[0, "self_changed"]
    assert list(df.columns[:len(tables.SCHEMAS["cells"])]) == [c.name for c in tables.SCHEMAS["cells"]]
    with pytest.raises(SchemaError, match="missing columns"):
        tables.validate(pd.DataFrame([row]).drop(columns=["changed"]), "cells")
