"""Tables kept in parts (one Parquet file per batch item) and assembled in a given order.

A batch writes each item's rows of a table to its own small Parquet file as
soon as the item finishes.  The experiment's table is the concatenation of
those parts in the order the caller gives (manifest order), written by
streaming one part at a time, so memory is bounded by the largest part, not
by the experiment.

Column set and types of the assembled table: the union of the parts' columns
in order of first appearance; a column missing from a part is null there
(NaN for numbers); an integer column that meets floats becomes float (Arrow's
permissive promotion).  Every part is checked against the table's schema.
"""

from __future__ import annotations

import contextlib
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from ..exceptions import SchemaError
from ..tables import empty, validate
from ._write import _NAN_TEXT, _stem, atomic_path, write_table

__all__ = ["read_table_parts", "write_part", "write_table_parts"]


def write_part(table: pd.DataFrame, path, *, name: str, fsync=True) -> int:
    """Validate one item's rows of table ``name`` and write them atomically as Parquet.

    ``fsync`` as in :func:`~lasecyto.io.atomic_path`.  A Parquet file ends
    with its footer, so a short file cannot be read as a valid part.

    Returns
    -------
    int
        Rows written.
    """
    df = validate(table, name)
    arrow = pa.Table.from_pandas(df, preserve_index=False)
    with atomic_path(path, fsync=fsync) as tmp:
        pq.write_table(arrow.replace_schema_metadata(None), tmp)
    return len(df)


def _has_nulls(path, column):
    meta = pq.read_metadata(path)
    idx = meta.schema.to_arrow_schema().get_field_index(column)
    for g in range(meta.num_row_groups):
        stats = meta.row_group(g).column(idx).statistics
        if stats is None or not stats.has_null_count or stats.null_count:
            return True
    return False


def _union_schema(paths, name):
    """The assembled table's schema; an integer column with a missing value anywhere becomes float,
    as it would in the whole table (so every part is written as the whole table would be)."""
    schemas = [pq.read_schema(p) for p in paths]
    try:
        schema = pa.unify_schemas(schemas, promote_options="permissive").remove_metadata()
    except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
        raise SchemaError("parts of a table disagree on column types", path=paths[0].parent.parent,
                          field=name, expected="one type per column",
                          found=" ".join(str(exc).split())) from None
    fields = []
    for f in schema:
        if pa.types.is_integer(f.type) and any(
                f.name not in s.names or _has_nulls(p, f.name) for p, s in zip(paths, schemas)):
            f = f.with_type(pa.float64())
        fields.append(f)
    return pa.schema(fields)


def _aligned(path, schema, name):
    """One part as an Arrow table with exactly ``schema``'s columns and types."""
    part = pq.read_table(path)
    columns = []
    for f in schema:
        if f.name in part.column_names:
            col = part.column(f.name)
            if col.type != f.type:
                try:
                    col = col.cast(f.type)
                except pa.ArrowException as exc:  # invalid value or a cast Arrow cannot do
                    raise SchemaError("part has a column of another type", path=path, field=f.name,
                                      expected=str(f.type), found=" ".join(str(exc).split())) from None
            columns.append(col)
        else:
            columns.append(pa.nulls(part.num_rows, type=f.type))
    return pa.Table.from_arrays(columns, schema=schema)


def _nonempty(paths):
    """Parts with rows (empty parts carry no column information worth merging)."""
    out = []
    for p in paths:
        p = Path(p)
        if pq.read_metadata(p).num_rows:
            out.append(p)
    return out


def read_table_parts(paths, *, name: str) -> pd.DataFrame:
    """Concatenate parts of table ``name`` in the given order, in memory.

    Gives the same table as reading the file written by
    :func:`write_table_parts` from the same parts.
    """
    paths = _nonempty(paths)
    if not paths:
        return empty(name)
    schema = _union_schema(paths, name)
    arrow = pa.concat_tables([_aligned(p, schema, name) for p in paths])
    return validate(arrow.to_pandas(), name)


def write_table_parts(paths, path_stem, *, name: str, csv: bool = True) -> tuple[Path, Path | None, int]:
    """Stream parts of table ``name`` (in the given order) into one Parquet and one CSV file.

    The files are those :func:`write_table` writes (same names, same CSV
    text), each written atomically; memory is bounded by the largest part.
    ``csv=False`` writes the Parquet file only (and removes an old CSV file).

    Returns
    -------
    (pathlib.Path, pathlib.Path or None, int)
        The Parquet path, the CSV path (None without CSV) and the number of rows.
    """
    paths = _nonempty(paths)
    if not paths:
        pq_path, csv_path = write_table(empty(name), path_stem, name=name, csv=csv)
        return pq_path, csv_path, 0
    schema = _union_schema(paths, name)
    stem = _stem(path_stem)
    stem.parent.mkdir(parents=True, exist_ok=True)
    pq_path = stem.with_name(stem.name + ".parquet")
    csv_path = stem.with_name(stem.name + ".csv")
    rows = 0
    with contextlib.ExitStack() as stack:
        # closed in reverse order: CSV file, its rename, Parquet writer, its rename
        tmp_pq = stack.enter_context(atomic_path(pq_path))
        writer = stack.enter_context(contextlib.closing(pq.ParquetWriter(tmp_pq, schema)))
        fh = None
        if csv:
            tmp_csv = stack.enter_context(atomic_path(csv_path))
            fh = stack.enter_context(open(tmp_csv, "w", encoding="utf-8", newline=""))
        for i, path in enumerate(paths):
            arrow = _aligned(path, schema, name)
            df = validate(arrow.to_pandas(), name, path=path)
            writer.write_table(arrow)
            if fh is not None:
                df.to_csv(fh, index=False, header=i == 0, na_rep=_NAN_TEXT, lineterminator="\n")
            rows += len(df)
    if not csv:
        with contextlib.suppress(FileNotFoundError):
            csv_path.unlink()
        csv_path = None
    return pq_path, csv_path, rows
