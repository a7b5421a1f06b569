"""Tables kept in per-item parts: streamed assembly equals in-memory assembly and pandas' concat."""

import numpy as np
import pandas as pd
import pytest

from lasecyto import tables
from lasecyto.exceptions import SchemaError
from lasecyto.io import read_table, read_table_parts, write_part, write_table, write_table_parts


def _cells(ids, *, extra=None):
    n = len(ids)
    def column(kind):
        return np.full(n, "", dtype=object) if kind == "str" else np.zeros(n, dtype={
            "int": "int64", "float": "float64", "bool": "bool"}[kind])

    df = pd.DataFrame({c.name: column(c.kind) for c in tables.SCHEMAS["cells"]})
    df["cell_id"] = ids
    df["dish"] = "A"
    df["condition"] = "control"
    df["index_change"] = np.linspace(0, 1e-3, n)
    df.loc[0, "onset_s"] = np.nan
    if extra is not None:
        df[extra] = np.arange(n, dtype=np.int64)
    return df


def test_parts_assemble_in_the_given_order(tmp_path):
    a, b, c = _cells(["a1", "a2"]), _cells(["b1"], extra="comb_index"), tables.empty("cells")
    paths = []
    for name, df in (("a", a), ("b", b), ("c", c)):
        assert write_part(df, tmp_path / f"{name}.parquet", name="cells") == len(df)
        paths.append(tmp_path / f"{name}.parquet")
    order = [paths[1], paths[2], paths[0]]
    in_memory = read_table_parts(order, name="cells")
    pq_path, csv_path, rows = write_table_parts(order, tmp_path / "out" / "cells", name="cells")
    assert rows == 3
    assert list(in_memory["cell_id"]) == ["b1", "a1", "a2"]
    # a column missing from a part is null there (NaN); the integer column becomes float
    assert np.isnan(in_memory["comb_index"].iloc[1:]).all() and in_memory["comb_index"].iloc[0] == 0
    pd.testing.assert_frame_equal(read_table(pq_path, name="cells"), in_memory, check_exact=True)
    pd.testing.assert_frame_equal(read_table(csv_path, name="cells"), in_memory, check_exact=True)
    # the same files as the one-shot writer would give from the concatenated table
    whole = tables.validate(pd.concat([b, a], ignore_index=True), "cells")
    pq2, csv2 = write_table(whole, tmp_path / "whole" / "cells", name="cells")
    assert csv_path.read_bytes() == csv2.read_bytes()


def test_no_parts_give_the_empty_table(tmp_path):
    pq_path, _, rows = write_table_parts([], tmp_path / "lines", name="lines")
    assert rows == 0
    assert len(read_table(pq_path, name="lines")) == 0
    assert list(read_table_parts([], name="lines").columns) == [c.name for c in tables.SCHEMAS["lines"]]


def test_part_of_the_wrong_schema(tmp_path):
    with pytest.raises(SchemaError, match="missing columns"):
        write_part(pd.DataFrame({"x": [1]}), tmp_path / "x.parquet", name="cells")
