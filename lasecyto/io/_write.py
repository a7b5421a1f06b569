"""Atomic writers, table files (Parquet + CSV) and file hashes."""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import math
import os
import secrets
from pathlib import Path

import numpy as np
import pandas as pd

from ..exceptions import InputError, SchemaError
from ..tables import SCHEMAS, validate

__all__ = ["atomic_path", "file_sha256", "read_table", "write_json", "write_table"]

_TABLE_SUFFIXES = (".parquet", ".csv")
_NAN_TEXT = "NaN"  # how a missing float is spelled in our CSV files (an empty cell is an empty string)


def _fsync_dir(directory):
    """Flush a directory entry to disk where the platform allows it (POSIX)."""
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


@contextlib.contextmanager
def atomic_path(path, *, fsync=True):
    """Write a file atomically through a temporary file in the same directory.

    Yields the path of an empty temporary file beside ``path``.  When the
    block ends without error the temporary file is flushed to disk and moved
    onto ``path`` with :func:`os.replace`; when it raises, the temporary file
    is removed and ``path`` is left as it was.

    Parameters
    ----------
    path : str or os.PathLike
        Final destination.  Its directory must exist.
    fsync : bool
        Flush the file and its directory entry to disk (default).  Without
        it the rename is still atomic for other processes and survives the
        writer being killed, but a power cut may leave an empty or short file
        (for files whose readers check them, such as per-item results).

    Examples
    --------
    >>> with atomic_path(tmp / "x.txt") as tmp_file:            # doctest: +SKIP
    ...     tmp_file.write_text("hello")
    """
    path = Path(path)
    directory = path.parent if str(path.parent) else Path(".")
    tmp = directory / f".{path.name}.{secrets.token_hex(6)}.tmp"
    # O_EXCL: never reuse an existing name; mode 0o666 lets the umask decide permissions
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    os.close(fd)
    try:
        yield tmp
        if fsync:
            with open(tmp, "r+b") as fh:
                os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    if fsync:
        _fsync_dir(directory)


def file_sha256(path) -> str:
    """Hex SHA-256 digest of a file's bytes, read in 1 MiB chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _jsonable(obj, where):
    """Plain JSON values: NaN and infinities become None, numpy and paths become Python."""
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        x = float(obj)
        return x if math.isfinite(x) else None
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    if isinstance(obj, np.ndarray):
        return [_jsonable(v, f"{where}[{i}]") for i, v in enumerate(obj.tolist())]
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        obj = {f.name: getattr(obj, f.name) for f in dataclasses.fields(obj)}
    if isinstance(obj, dict):
        return {str(k): _jsonable(v, f"{where}.{k}") for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v, f"{where}[{i}]") for i, v in enumerate(obj)]
    raise InputError("value cannot be written as JSON", field=where,
                     expected="None, bool, number, str, path, list, dict, dataclass or numpy array",
                     found=type(obj).__name__)


def write_json(obj, path, *, fsync=True) -> Path:
    """Write ``obj`` as JSON atomically (indent 2, sorted keys, NaN written as null).

    ``fsync`` as in :func:`atomic_path`.

    Returns
    -------
    pathlib.Path
        The written path.
    """
    path = Path(path)
    text = json.dumps(_jsonable(obj, "$"), indent=2, sort_keys=True, allow_nan=False) + "\n"
    with atomic_path(path, fsync=fsync) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return path


def _stem(path_stem):
    p = Path(path_stem)
    return p.with_suffix("") if p.suffix.lower() in _TABLE_SUFFIXES else p


def write_table(table: pd.DataFrame, path_stem, *, name: str, csv: bool = True) -> tuple[Path, Path | None]:
    """Validate a table against its schema and write it as Parquet and CSV.

    Parameters
    ----------
    table : pandas.DataFrame
    path_stem : str or os.PathLike
        Destination without suffix (a ``.parquet`` or ``.csv`` suffix is
        dropped).  Missing parent directories are created.
    name : str
        Schema name in :data:`lasecyto.tables.SCHEMAS`.
    csv : bool
        Also write the CSV file (default).  When False, a CSV file of the
        same name left by an earlier write is removed, so the two never disagree.

    Returns
    -------
    (pathlib.Path, pathlib.Path or None)
        The Parquet and CSV paths (None when no CSV was written).  Each file
        is written atomically.
    """
    df = validate(table, name)
    stem = _stem(path_stem)
    stem.parent.mkdir(parents=True, exist_ok=True)
    pq_path = stem.with_name(stem.name + ".parquet")
    csv_path = stem.with_name(stem.name + ".csv")
    with atomic_path(pq_path) as tmp:
        df.to_parquet(tmp, engine="pyarrow", index=False)
    if not csv:
        with contextlib.suppress(FileNotFoundError):
            csv_path.unlink()
        return pq_path, None
    with atomic_path(csv_path) as tmp:
        df.to_csv(tmp, index=False, na_rep=_NAN_TEXT, lineterminator="\n")
    return pq_path, csv_path


_TRUE = {"true", "1"}
_FALSE = {"false", "0"}


def _csv_column(raw: pd.Series, kind, path, col):
    """Convert a column of CSV text to the schema kind, naming the first bad cell."""
    text = raw.str.strip()

    def bad(mask, expected):
        i = int(np.flatnonzero(mask.to_numpy())[0])
        raise SchemaError("cell of the wrong kind", path=path, field=f"line {i + 2}, column '{col}'",
                          expected=expected, found=repr(raw.iloc[i]))

    if kind == "str":
        return raw.astype(object)
    if kind == "bool":
        low = text.str.lower()
        ok = low.isin(_TRUE | _FALSE)
        if not ok.all():
            bad(~ok, "True or False")
        return low.isin(_TRUE).to_numpy(dtype=bool)
    num = pd.to_numeric(text.where(text != "", _NAN_TEXT), errors="coerce")
    nan_text = text.str.lower().isin({"nan", ""})
    not_number = num.isna() & ~nan_text
    if kind == "float":
        if not_number.any():
            bad(not_number, "a number")
        return num.to_numpy(dtype=np.float64)
    # int
    arr = num.to_numpy(dtype=np.float64)
    not_int = pd.Series(~np.isfinite(arr) | (arr != np.round(arr)))
    if not_int.any():
        bad(not_int, "an integer")
    return arr.astype(np.int64)


def _csv_extra(raw: pd.Series):
    """Best-effort type of a column outside the schema: bool, number or text."""
    text = raw.str.strip()
    if len(text) and text.isin({"True", "False"}).all():
        return (text == "True").to_numpy(dtype=bool)
    num = pd.to_numeric(text.where(text != "", _NAN_TEXT), errors="coerce")
    if len(text) and not (num.isna() & ~text.str.lower().isin({"nan", ""})).any():
        return num.to_numpy()
    return raw.astype(object)


def _read_csv_table(path, name):
    try:
        raw = pd.read_csv(path, dtype=str, keep_default_na=False, na_filter=False)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise InputError("not a readable CSV table", path=path,
                         found=" ".join(str(exc).split())) from None
    kinds = {c.name: c.kind for c in SCHEMAS[name]} if name in SCHEMAS else {}
    cols = {}
    for col in raw.columns:
        if col in kinds:
            cols[col] = _csv_column(raw[col], kinds[col], path, col)
        else:
            cols[col] = _csv_extra(raw[col])
    return pd.DataFrame(cols, index=pd.RangeIndex(len(raw)))


def read_table(path, *, name: str) -> pd.DataFrame:
    """Read a table written by :func:`write_table` (``.parquet`` or ``.csv``) and validate it.

    Raises
    ------
    InputError
        Missing file, unknown suffix or unreadable file.
    SchemaError
        The table does not match the schema ``name``.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in _TABLE_SUFFIXES:
        raise InputError("unknown table format", path=path, field="suffix",
                         expected="'.parquet' or '.csv'", found=repr(path.suffix))
    if not path.is_file():
        raise InputError("table file not found", path=path, expected="an existing file", found="nothing")
    if name not in SCHEMAS:  # fail before touching the file
        validate(pd.DataFrame(), name)
    if suffix == ".parquet":
        try:
            df = pd.read_parquet(path, engine="pyarrow")
        except Exception as exc:  # pyarrow raises several unrelated types for damaged files
            raise InputError("not a readable Parquet file", path=path,
                             found=" ".join(str(exc).split())) from None
    else:
        df = _read_csv_table(path, name)
    return validate(df, name, path=path)
