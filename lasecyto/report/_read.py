"""Read a run's tables for the report without holding the large ones whole.

Memory rule: the small tables (``cells``, ``thresholds``) are read whole; of
``lines``, ``tracks``, ``cell_frames`` and ``patterns`` the report reads one
cell at a time and only the columns it draws.  A run writes one Parquet row
group per cell (``io.write_table_parts``); the row groups that may hold a cell
are found from their ``cell_id`` statistics (a dict look-up for groups of one
cell), and the one row group last read is kept (split by cell) so that a row
group holding many cells is decoded once for consecutive reads of its cells.
Memory is therefore bounded by the largest row group of the drawn columns,
whatever the number of cells.
"""

from __future__ import annotations

import json
import logging
from pathlib import Path

import numpy as np
import pandas as pd

from .. import tables as _tables
from ..exceptions import InputError

__all__ = ["RunTables", "read_record"]

logger = logging.getLogger("lasecyto.report")

WHOLE = ("cells", "thresholds")
PER_CELL = ("lines", "tracks", "cell_frames", "patterns")


def read_record(run_dir):
    """The run record (``run_record.json``) as a dict; {} when there is none."""
    path = Path(run_dir) / "run_record.json"
    if not path.is_file():
        return {}
    try:
        record = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError("run record is not valid JSON", path=path, expected="a JSON object",
                         found=" ".join(str(exc).split())) from None
    if not isinstance(record, dict):
        raise InputError("run record is not a JSON object", path=path, expected="an object",
                         found=type(record).__name__)
    return record


class _FileSource:
    """One Parquet table file, read by row group."""

    def __init__(self, path, name):
        import pyarrow.parquet as pq

        self.path = Path(path)
        self.name = name
        try:
            self._file = pq.ParquetFile(self.path)
        except Exception as exc:  # pyarrow raises several types for a damaged file
            raise InputError("table is not a readable Parquet file", path=self.path, expected="a Parquet file",
                             found=" ".join(str(exc).split())) from None
        self.columns = list(self._file.schema_arrow.names)
        if "cell_id" not in self.columns:
            raise InputError("missing columns", path=self.path, field="cell_id", expected="present",
                             found="absent")
        meta = self._file.metadata
        self.n_rows = meta.num_rows
        idx = self.columns.index("cell_id")
        # groups of one cell (what a run writes) are found by a dict look-up; groups spanning
        # several cells, or without statistics, are checked one by one
        self._single = {}
        self._groups = []
        for g in range(meta.num_row_groups):
            stats = meta.row_group(g).column(idx).statistics
            if stats is not None and stats.has_min_max and str(stats.min) == str(stats.max):
                self._single.setdefault(str(stats.min), []).append(g)
            elif stats is not None and stats.has_min_max:
                self._groups.append((g, str(stats.min), str(stats.max)))
            else:
                self._groups.append((g, None, None))
        self._cached = None  # (group, columns, {cell_id: DataFrame})

    def whole(self, columns):
        return self._file.read(columns=columns).to_pandas()

    def cell(self, cell_id, columns):
        groups = list(self._single.get(cell_id, ()))
        groups += [g for g, low, high in self._groups if low is None or low <= cell_id <= high]
        parts = []
        for g in sorted(groups):
            split = self._group(g, columns)
            if cell_id in split:
                parts.append(split[cell_id])
        if not parts:
            return None
        return parts[0] if len(parts) == 1 else pd.concat(parts, ignore_index=True)

    def _group(self, g, columns):
        key = (g, tuple(columns))
        if self._cached is None or self._cached[0] != key:
            self._cached = None  # free the previous group before reading the next
            df = self._file.read_row_group(g, columns=list(columns)).to_pandas()
            ids = df["cell_id"].astype(str).to_numpy()
            split = {}
            if len(ids) and (ids[0] == ids).all():
                split[ids[0]] = df
            elif len(ids):
                for cid, index in df.groupby(ids, sort=False).indices.items():
                    split[str(cid)] = df.iloc[index].reset_index(drop=True)
            self._cached = (key, split)
        return self._cached[1]


class _FrameSource:
    """A table given in memory."""

    def __init__(self, df, name):
        self.name = name
        self.path = f"table '{name}'"
        self._df = df
        self.columns = list(df.columns)
        self.n_rows = len(df)
        if "cell_id" not in self.columns:
            raise InputError("missing columns", path=self.path, field="cell_id", expected="present",
                             found="absent")
        self._index = None

    def whole(self, columns):
        return self._df[list(columns)].reset_index(drop=True)

    def cell(self, cell_id, columns):
        if self._index is None:
            ids = self._df["cell_id"].astype(str).to_numpy()
            self._index = {str(k): v for k, v in pd.Series(np.arange(ids.size)).groupby(ids).indices.items()}
        rows = self._index.get(cell_id)
        if rows is None:
            return None
        return self._df.iloc[rows][list(columns)].reset_index(drop=True)


class RunTables:
    """The tables of a run directory, read as the report needs them.

    Parameters
    ----------
    run_dir : path
        Run directory with ``tables/<name>.parquet``.
    given : dict of str to pandas.DataFrame, optional
        Tables to use instead of the files, by name.
    """

    def __init__(self, run_dir, given=None):
        self.run_dir = Path(run_dir)
        self._sources = {}
        given = dict(given or {})
        for name in WHOLE + PER_CELL:
            if given.get(name) is not None:
                self._sources[name] = _FrameSource(given[name], name)
                continue
            path = self.run_dir / "tables" / f"{name}.parquet"
            if path.is_file():
                self._sources[name] = _FileSource(path, name)
        self._whole = {}

    def has(self, name):
        """True when the table exists and has rows."""
        src = self._sources.get(name)
        return src is not None and src.n_rows > 0

    def columns(self, name):
        src = self._sources.get(name)
        return [] if src is None else list(src.columns)

    def whole(self, name):
        """A small table (``cells``, ``thresholds``) whole and validated against its schema; None when absent."""
        if name not in WHOLE:
            raise InputError("table is read per cell", field="name", expected=f"one of {list(WHOLE)}",
                             found=repr(name))
        if name not in self._whole:
            src = self._sources.get(name)
            df = None
            if src is not None:
                df = _tables.validate(src.whole(src.columns), name, path=src.path)
            self._whole[name] = df
        return self._whole[name]

    def cell(self, name, cell_id, columns):
        """Rows of one cell with the requested columns that the table has (None when it has none).

        The columns the table lacks are left out; the caller checks what it needs.
        """
        src = self._sources.get(name)
        if src is None:
            return None
        cols = ["cell_id"] + [c for c in dict.fromkeys(columns) if c in src.columns and c != "cell_id"]
        rows = src.cell(str(cell_id), cols)
        if rows is None or not len(rows):
            return None
        return rows
