"""Experiment manifest (TOML): dishes, cells, their stacks, the lamp and stage parameters."""

from __future__ import annotations

import math
import numbers
import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from ..exceptions import InputError
from ._cavity_spec import KINDS, parse_pump, parse_sphere
from ._sidecar import default_sidecar_path

__all__ = ["CellSpec", "DishSpec", "FieldSpec", "LampSpec", "Manifest", "missing_files", "read_manifest"]

RESONATORS = ("fabry-perot", "sphere")


@dataclass(frozen=True)
class LampSpec:
    """Lamp frames for wavelength calibration; paths are absolute."""

    stack: Path
    sidecar: Path
    reference: str


@dataclass(frozen=True)
class DishSpec:
    """A dish (or well): its condition and perturbation time (NaN when none)."""

    dish: str
    condition: str
    perturbation_s: float = math.nan


@dataclass(frozen=True)
class FieldSpec:
    """A camera field of view: its emission-image stack (TIFF / OME-TIFF) and optional sidecar."""

    field: str
    dish: str
    images: Path
    sidecar: Path | None = None


@dataclass(frozen=True)
class CellSpec:
    """A cell: where its frames are and which detector rows it owns (None: all rows).

    ``stack`` is None for a cell seen only in emission images.  A cell in a
    camera field names the ``field`` and either ``position_px`` (row, col) or
    ``roi_px`` (row0, col0, row1, col1, half-open) in that field's images.
    """

    cell_id: str
    dish: str
    condition: str
    perturbation_s: float
    stack: Path | None
    sidecar: Path | None
    rows: tuple[int, int] | None = None
    cell_thickness_um: float = math.nan
    field: str | None = None
    position_px: tuple[float, float] | None = None
    roi_px: tuple[int, int, int, int] | None = None


@dataclass(frozen=True)
class Manifest:
    """A validated experiment manifest; every path is absolute."""

    path: Path
    root: Path
    name: str
    resonator: str
    gap_um: float
    synthetic: bool
    description: str
    lamp: LampSpec | None
    dishes: dict = field(default_factory=dict)
    cells: tuple = ()
    parameters: dict = field(default_factory=dict)
    medium: str = ""
    cell_thickness_um: float = math.nan
    fields: dict = field(default_factory=dict)
    control_conditions: tuple = ()
    classifier_model: Path | None = None
    kind: str = "time-lapse"
    sphere: dict | None = None
    pump: dict | None = None
    recipe: str | None = None  # [experiment] recipe: a path relative to the manifest or a built-in name


def _join(root, relative):
    """Absolute, normalised path of a manifest entry (relative to the manifest directory)."""
    return Path(os.path.normpath(root / relative))


def _show(value):
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


class _Problems:
    """Collects structural problems so that all of them are reported at once."""

    def __init__(self):
        self.items = []

    def add(self, field, message, expected, found):
        self.items.append(f"{field}: {message} (expected {expected}, found {found})")

    def text(self, doc, key, where, *, required=True):
        if key not in doc:
            if required:
                self.add(f"{where}.{key}", "missing", "a string", "absent")
            return None
        v = doc[key]
        if not isinstance(v, str) or not v.strip():
            self.add(f"{where}.{key}", "not a non-empty string", "a non-empty string", _show(v))
            return None
        return v

    def number(self, doc, key, where, *, positive=False, allow_nan=False):
        if key not in doc:
            return math.nan
        v = doc[key]
        ok = isinstance(v, numbers.Real) and not isinstance(v, bool)
        if ok and math.isnan(v):
            ok = allow_nan
        elif ok:
            ok = math.isfinite(v) and (v > 0 if positive else True)
        if not ok:
            self.add(f"{where}.{key}", "bad number", "a number > 0" if positive else "a finite number", _show(v))
            return math.nan
        return float(v)


def _table(doc, key, problems, where):
    v = doc.get(key)
    if v is None:
        return None
    if not isinstance(v, dict):
        problems.add(where, "not a table", f"a [{key}] table", type(v).__name__)
        return None
    return v


def _array_of_tables(doc, key, problems):
    v = doc.get(key, [])
    if not isinstance(v, list) or not all(isinstance(t, dict) for t in v):
        problems.add(key, "not an array of tables", f"[[{key}]] entries", type(v).__name__)
        return []
    return v


def _rows(value, problems, where):
    ok = (isinstance(value, list) and len(value) == 2
          and all(isinstance(r, int) and not isinstance(r, bool) for r in value)
          and 0 <= value[0] < value[1])
    if not ok:
        problems.add(where, "bad detector row range", "[start, stop] integers with 0 <= start < stop",
                     _show(value))
        return None
    return (int(value[0]), int(value[1]))


def _position(value, problems, where):
    ok = (isinstance(value, list) and len(value) == 2
          and all(isinstance(v, numbers.Real) and not isinstance(v, bool) and math.isfinite(v) and v >= 0
                  for v in value))
    if not ok:
        problems.add(where, "bad image position", "[row, col] pixel coordinates >= 0", _show(value))
        return None
    return (float(value[0]), float(value[1]))


def _roi(value, problems, where):
    ok = (isinstance(value, list) and len(value) == 4
          and all(isinstance(v, int) and not isinstance(v, bool) for v in value)
          and 0 <= value[0] < value[2] and 0 <= value[1] < value[3])
    if not ok:
        problems.add(where, "bad region of interest",
                     "[row0, col0, row1, col1] integers with 0 <= row0 < row1 and 0 <= col0 < col1", _show(value))
        return None
    return tuple(int(v) for v in value)


def _controls(exp, conditions, problems):
    """The control conditions named by ``experiment.control_condition`` (a string or a list of strings)."""
    if "control_condition" not in exp:
        return ()
    v = exp["control_condition"]
    names = [v] if isinstance(v, str) else v
    if not (isinstance(names, list) and names and all(isinstance(n, str) and n.strip() for n in names)):
        problems.add("experiment.control_condition", "bad control condition",
                     "a condition name or a list of them", _show(v))
        return ()
    unknown = [n for n in names if n not in conditions]
    if unknown:
        problems.add("experiment.control_condition", "not the condition of any dish",
                     f"one of {sorted(conditions)}" if conditions else "a condition of a [[dishes]] entry",
                     _show(unknown[0] if len(unknown) == 1 else unknown))
        return ()
    return tuple(dict.fromkeys(names))


def read_manifest(path) -> Manifest:
    """Read and validate an experiment manifest.

    Paths inside are resolved relative to the manifest's directory.  Stack
    and sidecar files are not required to exist (see :func:`missing_files`).

    Raises
    ------
    InputError
        One error listing every structural problem found, separated by "; ".
    """
    path = Path(path).resolve()
    root = path.parent
    try:
        with open(path, "rb") as fh:
            doc = tomllib.load(fh)
    except FileNotFoundError:
        raise InputError("manifest not found", path=path, expected="an existing TOML file",
                         found="nothing") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"invalid TOML: {exc}", path=path, expected="valid TOML",
                         found="a syntax error") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError("manifest unreadable", path=path, found=" ".join(str(exc).split())) from None

    p = _Problems()
    exp = _table(doc, "experiment", p, "experiment")
    if exp is None and "experiment" not in doc:
        p.add("experiment", "missing table", "an [experiment] table with a name", "absent")
    exp = exp or {}
    name = p.text(exp, "name", "experiment", required="experiment" in doc) or ""
    resonator = exp.get("resonator")
    if "experiment" in doc and resonator not in RESONATORS:
        p.add("experiment.resonator", "unsupported resonator", " or ".join(repr(r) for r in RESONATORS),
              "absent" if resonator is None else _show(resonator))
    gap_um = p.number(exp, "gap_um", "experiment", positive=True)
    # gap medium (a name of lasecyto.cavity.media, checked when the cells are processed) and the
    # thickness of the cell in the gap (partly filled gap), for the whole experiment or per cell
    medium = p.text(exp, "medium", "experiment", required=False) or ""
    thickness = p.number(exp, "cell_thickness_um", "experiment", positive=True)

    def _thickness_fits(value, where):
        if math.isfinite(value) and math.isfinite(gap_um) and value > gap_um:
            p.add(where, "cell thicker than the mirror gap", f"<= experiment.gap_um ({gap_um:g})", _show(value))

    _thickness_fits(thickness, "experiment.cell_thickness_um")
    kind = exp.get("kind", "time-lapse")
    if kind not in KINDS:
        p.add("experiment.kind", "unknown experiment kind", " or ".join(repr(k) for k in KINDS), _show(kind))
        kind = "time-lapse"
    sphere = parse_sphere(_table(doc, "sphere", p, "sphere"), p, required=resonator == "sphere")
    pump = parse_pump(_table(doc, "pump", p, "pump"), p, required=kind == "pump-series")
    synthetic = exp.get("synthetic", False)
    if not isinstance(synthetic, bool):
        p.add("experiment.synthetic", "not a boolean", "true or false", _show(synthetic))
        synthetic = False
    description = exp.get("description", "")
    if not isinstance(description, str):
        p.add("experiment.description", "not a string", "a string", _show(description))
        description = ""
    recipe = p.text(exp, "recipe", "experiment", required=False)

    lamp = None
    lamp_doc = _table(doc, "lamp", p, "lamp")
    if lamp_doc is not None:
        stack = p.text(lamp_doc, "stack", "lamp")
        reference = p.text(lamp_doc, "reference", "lamp")
        sidecar = p.text(lamp_doc, "sidecar", "lamp", required=False)
        if stack is not None and reference is not None and ("sidecar" not in lamp_doc or sidecar):
            stack_path = _join(root, stack)
            lamp = LampSpec(stack=stack_path,
                            sidecar=_join(root, sidecar) if sidecar else default_sidecar_path(stack_path),
                            reference=reference)

    parameters = _table(doc, "parameters", p, "parameters") or {}
    for stage, values in parameters.items():
        if not isinstance(values, dict):
            p.add(f"parameters.{stage}", "not a table", "a table of stage parameters", _show(values))

    dishes = {}
    for i, d in enumerate(_array_of_tables(doc, "dishes", p)):
        where = f"dishes[{i}]"
        dish = p.text(d, "dish", where)
        condition = p.text(d, "condition", where)
        pert = p.number(d, "perturbation_s", where, allow_nan=True)
        if dish is None:
            continue
        if dish in dishes:
            p.add(f"{where}.dish", "repeated dish", "unique dish names", _show(dish))
            continue
        if condition is not None:
            dishes[dish] = DishSpec(dish=dish, condition=condition, perturbation_s=pert)
        else:
            dishes[dish] = None  # known name, problem already recorded

    fields = {}
    for i, f in enumerate(_array_of_tables(doc, "fields", p)):
        where = f"fields[{i}]"
        name = p.text(f, "field", where)
        dish = p.text(f, "dish", where)
        images = p.text(f, "images", where)
        sidecar = p.text(f, "sidecar", where, required=False)
        if name is None:
            continue
        if name in fields:
            p.add(f"{where}.field", "repeated field", "unique field names", _show(name))
            continue
        if dish is not None and dish not in dishes:
            p.add(f"{where}.dish", "unknown dish", f"one of {sorted(dishes)}" if dishes else "a [[dishes]] entry",
                  _show(dish))
            dish = None
        if None in (dish, images) or ("sidecar" in f and sidecar is None):
            fields[name] = None  # known name, problem already recorded
            continue
        fields[name] = FieldSpec(field=name, dish=dish, images=_join(root, images),
                                 sidecar=_join(root, sidecar) if sidecar else None)

    cells, seen = [], set()
    cell_docs = _array_of_tables(doc, "cells", p)
    if doc.get("cells", []) == []:
        p.add("cells", "no cells", "one or more [[cells]] entries", "none")
    for i, c in enumerate(cell_docs):
        where = f"cells[{i}]"
        cell_id = p.text(c, "cell_id", where)
        dish = p.text(c, "dish", where)
        field_name = p.text(c, "field", where, required=False)
        stack = p.text(c, "stack", where, required="field" not in c)
        sidecar = p.text(c, "sidecar", where, required=False)
        bad_sidecar = "sidecar" in c and sidecar is None
        rows = _rows(c["rows"], p, f"{where}.rows") if "rows" in c else None
        cell_t = p.number(c, "cell_thickness_um", where, positive=True) if "cell_thickness_um" in c else thickness
        _thickness_fits(cell_t, f"{where}.cell_thickness_um")
        bad_image = ("field" in c and field_name is None)
        position = _position(c["position_px"], p, f"{where}.position_px") if "position_px" in c else None
        roi = _roi(c["roi_px"], p, f"{where}.roi_px") if "roi_px" in c else None
        bad_image |= ("position_px" in c and position is None) or ("roi_px" in c and roi is None)
        if field_name is not None:
            if field_name not in fields:
                p.add(f"{where}.field", "unknown field",
                      f"one of {sorted(fields)}" if fields else "a [[fields]] entry", _show(field_name))
                bad_image = True
            elif fields[field_name] is not None and dish is not None and fields[field_name].dish != dish:
                p.add(f"{where}.field", "field of another dish", f"a field of dish {dish!r}",
                      f"{field_name!r} of dish {fields[field_name].dish!r}")
                bad_image = True
            if "position_px" in c and "roi_px" in c:
                p.add(where, "both a position and a region of interest", "position_px or roi_px", "both")
                bad_image = True
            elif "position_px" not in c and "roi_px" not in c:
                p.add(where, "cell in a camera field without a location",
                      "position_px = [row, col] or roi_px = [row0, col0, row1, col1]", "neither")
                bad_image = True
        elif "position_px" in c or "roi_px" in c:
            p.add(f"{where}.field", "image location without a field", "the [[fields]] entry it refers to",
                  "absent")
            bad_image = True
        if cell_id is not None:
            if cell_id in seen:
                p.add(f"{where}.cell_id", "repeated cell_id", "unique cell ids", _show(cell_id))
                cell_id = None
            else:
                seen.add(cell_id)
        if dish is not None and dish not in dishes:
            p.add(f"{where}.dish", "unknown dish", f"one of {sorted(dishes)}" if dishes else "a [[dishes]] entry",
                  _show(dish))
            dish = None
        if "rows" in c and "stack" not in c:
            p.add(f"{where}.rows", "detector rows without a spectral stack", "a stack", "absent")
            continue
        if None in (cell_id, dish) or (stack is None and field_name is None) or bad_sidecar or bad_image \
                or ("rows" in c and rows is None) or ("stack" in c and stack is None):
            continue
        spec = dishes[dish]
        if spec is None or (field_name is not None and fields.get(field_name) is None):
            continue
        stack_path = _join(root, stack) if stack is not None else None
        if sidecar:
            sidecar_path = _join(root, sidecar)
        else:
            sidecar_path = default_sidecar_path(stack_path) if stack_path is not None else None
        cells.append(CellSpec(cell_id=cell_id, dish=dish, condition=spec.condition,
                              perturbation_s=spec.perturbation_s, stack=stack_path, sidecar=sidecar_path,
                              rows=rows, cell_thickness_um=cell_t, field=field_name, position_px=position,
                              roi_px=roi))
    conditions = {d.condition for d in dishes.values() if d is not None}
    controls = _controls(exp, conditions, p)
    model = None
    if "classifier_model" in exp:
        text = p.text(exp, "classifier_model", "experiment")
        model = _join(root, text) if text else None
    if p.items:
        n = len(p.items)
        raise InputError(f"{n} problem{'s' if n > 1 else ''} in the manifest: " + "; ".join(p.items), path=path)
    return Manifest(path=path, root=root, name=name, resonator=resonator, gap_um=gap_um, synthetic=synthetic,
                    description=description, lamp=lamp, dishes=dishes, cells=tuple(cells),
                    parameters=parameters, medium=medium, cell_thickness_um=thickness,
                    fields={k: v for k, v in fields.items() if v is not None},
                    control_conditions=controls, classifier_model=model, kind=kind, sphere=sphere,
                    pump=pump, recipe=recipe)


def missing_files(manifest: Manifest) -> list[tuple[str, Path]]:
    """``(owner, path)`` for every stack or sidecar of the manifest that does not exist.

    The owner is ``"lamp"`` or the cell id; the lamp comes first, then the
    cells in manifest order, each stack before its sidecar.  For a cell seen
    only in emission images, its field's image stack (and a sidecar named in
    the manifest) count as its stack; the images of a cell that also has a
    spectral stack are checked by the pattern stage, which reports a problem
    without losing the spectra.
    """
    out = []
    items = ([("lamp", manifest.lamp)] if manifest.lamp is not None else [])
    items += [(c.cell_id, c) for c in manifest.cells]
    for owner, spec in items:
        paths = (spec.stack, spec.sidecar)
        if getattr(spec, "stack", None) is None:
            f = manifest.fields[spec.field]
            paths = (f.images, f.sidecar)
        for p in paths:
            if p is not None and not p.exists():
                out.append((owner, p))
    return out
