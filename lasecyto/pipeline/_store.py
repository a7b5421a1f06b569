"""Per-item results persisted as they finish; resume; assembly in manifest order.

Layout of a run directory's item store::

    RUN_DIR/items/.lasecyto-items          tag: this directory belongs to lasecyto
    RUN_DIR/items/<slug>/item.json         the item's marker: key, status, error, tables
    RUN_DIR/items/<slug>/<table>.parquet   the item's rows of each table (``cells``: its row)

An item is *finished* when its marker exists; the marker is written last
(atomically) after every table file of the item, and removed first when the
item is recomputed, so an interrupted run never leaves a marker that points at
partial results.  The item's *key* is a SHA-256 over everything the item
depends on: every field of its :class:`~lasecyto.pipeline.CellJob` (resolved
parameters, lamp axis, rows, design, ...), the SHA-256 of every file a job
field names (absolute paths of stacks, sidecars, image stacks, ...), the
lasecyto version and the store format.  ``--resume`` keeps an item whose
marker says ``ok`` with the same key and whose table files hold the rows the
marker lists; everything else is recomputed.

Item files are renamed into place atomically but not flushed to disk one by
one (a flush costs about 12 ms per file on the reference machine, more than
a fast item takes): a killed run loses nothing, and after a power cut the
check above finds short or empty files and recomputes those items.  The
final tables and the run record are flushed.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import logging
import os
import re
import shutil
import socket
from collections.abc import Mapping, MutableMapping
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq

from .. import tables
from .._version import __version__
from ..exceptions import InputError, LasecytoError
from ..io import (file_sha256, read_table, read_table_parts, write_json, write_part, write_table,
                  write_table_parts)

__all__ = ["AssembledTables", "FileHashes", "ItemStore", "TableFiles", "item_key", "run_lock"]

logger = logging.getLogger("lasecyto.pipeline.store")

STORE_VERSION = 1
_TAG = ".lasecyto-items"
_MARKER = "item.json"
_LOCK = ".lasecyto-run.lock"


class FileHashes:
    """SHA-256 of files, computed once per (path, size, modification time)."""

    def __init__(self):
        self._cache = {}

    def __call__(self, path) -> str | None:
        path = Path(path)
        try:
            st = path.stat()
        except OSError:
            return None
        key = (str(path), st.st_size, st.st_mtime_ns)
        if key not in self._cache:
            self._cache[key] = file_sha256(path)
        return self._cache[key]


def _plain(value):
    """A JSON-able, canonical form of a job field (for hashing only)."""
    if value is None or isinstance(value, (bool, str, int)):
        return value
    if isinstance(value, float):
        return repr(value)  # exact, and NaN/inf survive
    if hasattr(value, "dtype") and hasattr(value, "tolist"):  # numpy scalars and arrays
        return {"dtype": str(value.dtype), "values": _plain(value.tolist())}
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {"__type__": type(value).__name__,
                **{f.name: _plain(getattr(value, f.name)) for f in dataclasses.fields(value)}}
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in sorted(value.items(), key=lambda kv: str(kv[0]))}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return repr(value)


def item_key(job, *, file_hash) -> str:
    """SHA-256 of everything one item depends on (see the module docstring).

    Parameters
    ----------
    job : dataclass instance
        The item's job (a :class:`~lasecyto.pipeline.CellJob`).
    file_hash : callable
        ``file_hash(path)`` returns the SHA-256 of a file or None (a :class:`FileHashes`).
    """
    fields = {f.name: getattr(job, f.name) for f in dataclasses.fields(job)}
    files = {}
    for name, value in fields.items():
        if isinstance(value, (str, os.PathLike)):
            text = os.fspath(value)
            if os.path.isabs(text) and os.path.isfile(text):
                files[name] = file_hash(text)
    doc = {"store": STORE_VERSION, "lasecyto": __version__, "job_type": type(job).__name__,
           "job": _plain(fields), "files": files}
    return hashlib.sha256(json.dumps(doc, sort_keys=True).encode("utf-8")).hexdigest()


def item_dirname(item_id: str) -> str:
    """File-system safe, collision-free directory name of an item."""
    slug = re.sub(r"[^A-Za-z0-9._-]+", "_", item_id).strip("._")[:60] or "item"
    return f"{slug}.{hashlib.sha256(item_id.encode('utf-8')).hexdigest()[:10]}"


def _cells_row(cell: dict) -> pd.DataFrame:
    row = {k: v for k, v in cell.items() if k not in ("note", "quantity")}
    row["quantity"] = cell.get("quantity", "")
    row["note"] = cell.get("note", "")
    return pd.DataFrame([row])


class ItemStore:
    """The per-item results of one run directory.

    Parameters
    ----------
    run_dir : path
        The run directory; items live in ``run_dir/items``.
    fresh : bool
        Start empty (a run without ``--resume``): an existing item store is
        removed.  A directory ``items`` that lasecyto did not make is never
        removed; it is an error.
    """

    def __init__(self, run_dir, *, fresh: bool):
        self.root = Path(run_dir) / "items"
        tag = self.root / _TAG
        if self.root.exists() and not tag.is_file():
            raise InputError("run directory holds an 'items' directory that lasecyto did not write",
                             path=self.root, expected=f"a lasecyto item store (with {_TAG})",
                             found="another directory; choose another --out")
        if fresh and self.root.exists():
            shutil.rmtree(self.root)
        self.root.mkdir(parents=True, exist_ok=True)
        for tmp in self.root.glob("*/.*.tmp"):  # left by a killed run (atomic writes not finished)
            tmp.unlink(missing_ok=True)
        if not tag.is_file():
            tag.write_text(f"lasecyto item store, format {STORE_VERSION}\n", encoding="utf-8")

    def _dir(self, item_id):
        return self.root / item_dirname(item_id)

    def marker(self, item_id) -> dict | None:
        """The item's marker, or None when absent or unreadable."""
        path = self._dir(item_id) / _MARKER
        try:
            doc = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        if not isinstance(doc, dict) or doc.get("item") != item_id:
            return None
        return doc

    def finished(self, item_id, key) -> dict | None:
        """The marker of a finished, intact item computed with ``key``; else None."""
        doc = self.marker(item_id)
        if doc is None or doc.get("key") != key or doc.get("status") != "ok":
            return None
        d = self._dir(item_id)
        try:
            for name, info in doc.get("tables", {}).items():
                if pq.read_metadata(d / info["file"]).num_rows != info["rows"]:
                    return None
        except (OSError, KeyError, TypeError, ValueError):
            return None
        return doc

    def save(self, item_id, key, result) -> dict:
        """Persist one item's result; returns its marker.

        A table that fails its schema turns the item into a failed item
        (with the reason) instead of stopping the batch.
        """
        d = self._dir(item_id)
        d.mkdir(parents=True, exist_ok=True)
        with contextlib.suppress(FileNotFoundError):
            (d / _MARKER).unlink()
        status, error, written = result.status, result.error, {}
        if status == "ok":
            parts = dict(result.tables)
            parts["cells"] = _cells_row(result.cell)
            try:
                for name, table in parts.items():
                    if table is None:
                        continue
                    rows = write_part(table, d / f"{name}.parquet", name=name, fsync=False)
                    written[name] = {"file": f"{name}.parquet", "rows": rows}
            except LasecytoError as exc:
                status, error, written = "failed", f"result not stored: {exc}", {}
        for old in d.glob("*.parquet"):
            if old.stem not in written:
                old.unlink()
        doc = {"lasecyto_item": STORE_VERSION, "item": item_id, "key": key, "status": status,
               "error": error, "seconds": round(float(result.seconds), 3), "tables": written}
        write_json(doc, d / _MARKER, fsync=False)
        return doc

    def parts(self, item_ids, name) -> list[Path]:
        """Files of table ``name`` of the finished items, in the order of ``item_ids``."""
        out = []
        for item_id in item_ids:
            doc = self.marker(item_id)
            if doc is not None and doc.get("status") == "ok" and name in doc.get("tables", {}):
                out.append(self._dir(item_id) / doc["tables"][name]["file"])
        return out

    def table_names(self, item_ids) -> list[str]:
        """Tables held by the finished items, in schema order."""
        found = set()
        for item_id in item_ids:
            doc = self.marker(item_id)
            if doc is not None and doc.get("status") == "ok":
                found.update(doc.get("tables", {}))
        return [n for n in tables.SCHEMAS if n in found]


class AssembledTables(MutableMapping):
    """The experiment's tables assembled from the item store, loaded only when read.

    Reading ``tables[name]`` concatenates the items' parts in manifest order
    (and keeps the result); assigning ``tables[name] = df`` replaces or adds
    a table.  Tables never read are later written by streaming the parts, so
    they never occupy memory as a whole.
    """

    def __init__(self, store: ItemStore, item_ids, names):
        self._store = store
        self._ids = list(item_ids)
        self._names = list(names)
        self._loaded = {}

    def __getitem__(self, name):
        if name not in self._loaded:
            if name not in self._names:
                raise KeyError(name)
            self._loaded[name] = read_table_parts(self._store.parts(self._ids, name), name=name)
        return self._loaded[name]

    def __setitem__(self, name, table):
        if name not in self._names:
            self._names.append(name)
        self._loaded[name] = table

    def __delitem__(self, name):
        self._names.remove(name)
        self._loaded.pop(name, None)

    def __iter__(self):
        return iter(list(self._names))

    def __len__(self):
        return len(self._names)

    def is_loaded(self, name) -> bool:
        return name in self._loaded

    def write(self, name, path_stem, *, csv=True) -> int:
        """Write table ``name`` as Parquet (+ CSV), streamed from the parts unless in memory."""
        if name in self._loaded:
            table = tables.validate(self._loaded[name], name)
            write_table(table, path_stem, name=name, csv=csv)
            return len(table)
        return write_table_parts(self._store.parts(self._ids, name), path_stem, name=name, csv=csv)[2]


class TableFiles(Mapping):
    """The tables of a finished run, read from ``RUN_DIR/tables/*.parquet`` on first access."""

    def __init__(self, table_dir, names):
        self._dir = Path(table_dir)
        self._names = list(names)
        self._cache = {}

    def __getitem__(self, name):
        if name not in self._names:
            raise KeyError(name)
        if name not in self._cache:
            self._cache[name] = read_table(self._dir / f"{name}.parquet", name=name)
        return self._cache[name]

    def __iter__(self):
        return iter(self._names)

    def __len__(self):
        return len(self._names)

    def __repr__(self):
        return f"TableFiles({str(self._dir)!r}, {self._names})"


def _pid_alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


@contextlib.contextmanager
def run_lock(run_dir):
    """Hold ``RUN_DIR/.lasecyto-run.lock`` while a run writes there.

    A lock left by a process that no longer exists on this host (a killed
    run) is taken over; a live one is an error.
    """
    path = Path(run_dir) / _LOCK
    me = {"pid": os.getpid(), "host": socket.gethostname()}
    for _ in range(3):
        try:
            fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
        except FileExistsError:
            try:
                other = json.loads(path.read_text(encoding="utf-8"))
                pid, host = int(other["pid"]), str(other["host"])
            except (OSError, ValueError, KeyError, TypeError):
                pid, host = None, me["host"]
            if host == me["host"] and (pid is None or not _pid_alive(pid)):
                logger.info("taking over the lock of an ended run (pid %s)", pid)
                with contextlib.suppress(FileNotFoundError):
                    path.unlink()
                continue
            raise InputError("run directory is in use by another run", path=path,
                             expected="no other run writing to this directory",
                             found=f"process {pid} on {host} (remove the lock file if that run is gone)") from None
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(me, fh)
        break
    else:
        raise InputError("run directory lock could not be taken", path=path,
                         expected="a lock file that can be created", found="it keeps reappearing")
    try:
        yield path
    finally:
        with contextlib.suppress(FileNotFoundError):
            path.unlink()
