"""Lazy access to matplotlib and axis labels taken from the table schemas."""

from __future__ import annotations

from .. import tables

_EXTRA = 'pip install "lasecyto[report]"'


def require_matplotlib():
    """Import and return matplotlib, or raise an ImportError naming the extra to install."""
    try:
        import matplotlib
    except ImportError as exc:
        raise ImportError(f"lasecyto.report needs matplotlib; install it with: {_EXTRA}") from exc
    return matplotlib


_UNITS = {c.name: c.unit for cols in tables.SCHEMAS.values() for c in cols}
_PRETTY_UNITS = {"um": "\u00b5m"}


def axis_label(column):
    """Axis label for a table column: its name in words and its unit from the schema."""
    unit = _UNITS.get(column, "")
    words = column
    for suffix in (unit.lower(), unit.lower().replace("/", "_per_")):
        if suffix and words.lower().endswith("_" + suffix):
            words = words[: -len(suffix) - 1]
            break
    words = words.replace("_", " ")
    return f"{words} ({_PRETTY_UNITS.get(unit, unit)})" if unit else words


def require_columns(table, columns, what):
    """Raise InputError when ``table`` lacks one of ``columns``."""
    from ..exceptions import InputError

    missing = [c for c in columns if c not in getattr(table, "columns", ())]
    if missing:
        raise InputError("missing columns", path=f"table '{what}'", field=", ".join(missing),
                         expected="present", found="absent")
