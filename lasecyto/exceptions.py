"""Exceptions and warnings raised by lasecyto.

Every error about bad input names the file, the field, what was expected and
what was found, on one line, so that a batch log can be read at a glance.
"""

from __future__ import annotations

__all__ = [
    "LasecytoError",
    "InputError",
    "SchemaError",
    "CalibrationError",
    "LasecytoWarning",
    "CalibrationWarning",
    "FitWarning",
]


class LasecytoError(Exception):
    """Base class of every error raised on purpose by lasecyto."""


class InputError(LasecytoError, ValueError):
    """A file, table or argument does not hold what it must.

    Parameters
    ----------
    message : str
        Short statement of the problem.
    path : str or os.PathLike, optional
        File in which the problem was found.
    field : str, optional
        Key, column, page or argument concerned.
    expected, found : object, optional
        What was required and what was there instead.

    Examples
    --------
    >>> str(InputError("too few frame times", path="a.json", field="frame_times_s",
    ...                expected="120 values", found="119 values"))
    'a.json: frame_times_s: too few frame times (expected 120 values, found 119 values)'
    """

    def __init__(self, message, *, path=None, field=None, expected=None, found=None):
        self.message = message
        self.path = None if path is None else str(path)
        self.field = field
        self.expected = expected
        self.found = found
        super().__init__(self._render())

    def _render(self):
        parts = []
        if self.path is not None:
            parts.append(self.path)
        if self.field is not None:
            parts.append(str(self.field))
        text = ": ".join(parts + [self.message]) if parts else self.message
        detail = []
        if self.expected is not None:
            detail.append(f"expected {self.expected}")
        if self.found is not None:
            detail.append(f"found {self.found}")
        if detail:
            text += " (" + ", ".join(detail) + ")"
        return " ".join(text.split())  # always one line

    def __reduce__(self):  # picklable across process pools
        return (_rebuild_input_error, (type(self), self.message, self.path, self.field,
                                       self.expected, self.found))


def _rebuild_input_error(cls, message, path, field, expected, found):
    return cls(message, path=path, field=field, expected=expected, found=found)


class SchemaError(InputError):
    """A table between stages lacks a column or has the wrong dtype."""


class CalibrationError(LasecytoError):
    """A wavelength calibration could not be established."""


class LasecytoWarning(UserWarning):
    """Base class of lasecyto's warnings."""


class CalibrationWarning(LasecytoWarning):
    """A calibration succeeded but something about it deserves a look."""


class FitWarning(LasecytoWarning):
    """A fit or inversion succeeded with a caveat (few lines, fractional mode number...)."""
