"""Sidecar metadata (JSON) of a spectral stack: frame times, exposure, pump, camera, wavelength axis."""

from __future__ import annotations

import json
import math
import numbers
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..calibration import WavelengthAxis
from ..exceptions import InputError

__all__ = ["CameraModel", "Sidecar", "check_sidecar", "default_sidecar_path", "read_sidecar"]

SIDECAR_VERSION = 1
#: value of ``camera.gain_counts_per_e`` asking for the photon-transfer gain (flat frames or the data)
PHOTON_TRANSFER = "photon-transfer"


@dataclass(frozen=True)
class CameraModel:
    """Linear camera: counts = offset + gain * photoelectrons (+ read noise), clipped at saturation.

    The numbers may also be measured: ``dark_stack`` names dark frames (offset
    map and read noise), ``flat_stack`` frames of a steady broadband scene for
    the photon-transfer gain, and ``gain_from_data`` asks for the
    photon-transfer gain on the data stack itself (see
    :func:`lasecyto.pipeline.resolve_camera`).  ``offset_map_counts`` is the
    measured per-pixel offset (rows x pixels) once resolved.
    """

    offset_counts: float = 0.0
    gain_counts_per_e: float = 1.0
    read_noise_e: float = 0.0
    saturation_counts: float = math.inf
    dark_stack: Path | None = None
    flat_stack: Path | None = None
    gain_from_data: bool = False
    offset_map_counts: np.ndarray | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True)
class Sidecar:
    """Metadata of one stack, as read by :func:`read_sidecar`.

    ``frame_times_s`` and ``pump_energy_nj`` are read-only arrays;
    ``pump_energy_nj`` holds one value per frame (a single number in the
    file is broadcast) or is None.  ``frame_exposure_s`` (optional key, one
    value per frame) is the exposure of each frame when they differ, e.g. a
    pump series recorded with longer exposures at low pump; None otherwise.
    """

    path: Path
    frame_times_s: np.ndarray
    exposure_s: float
    pump_energy_nj: np.ndarray | None
    camera: CameraModel
    wavelength: WavelengthAxis | None
    wavelength_guess: WavelengthAxis | None
    frame_exposure_s: np.ndarray | None = None


def default_sidecar_path(stack_path) -> Path:
    """The sidecar a stack has when none is named: the stack path with suffix ``.json``."""
    return Path(stack_path).with_suffix(".json")


def _is_number(v):
    return isinstance(v, numbers.Real) and not isinstance(v, bool)


def _number(value, path, field, *, low=None, strict=True, allow_inf=False):
    ok = _is_number(value) and (math.isfinite(value) or (allow_inf and value == math.inf))
    if ok and low is not None:
        ok = value > low if strict else value >= low
    if not ok:
        bound = "" if low is None else f" {'>' if strict else '>='} {low:g}"
        raise InputError("bad value", path=path, field=field, expected=f"a finite number{bound}",
                         found=repr(value))
    return float(value)


def _number_list(value, path, field, *, low=None):
    if not isinstance(value, list) or not value:
        raise InputError("bad value", path=path, field=field, expected="a non-empty list of numbers",
                         found=type(value).__name__ if not isinstance(value, list) else "an empty list")
    for i, v in enumerate(value):
        if not (_is_number(v) and math.isfinite(v)) or (low is not None and v < low):
            bound = "" if low is None else f" >= {low:g}"
            raise InputError("bad list element", path=path, field=f"{field}[{i}]",
                             expected=f"a finite number{bound}", found=repr(v))
    return np.asarray(value, dtype=np.float64)


def _axis(block, path, key):
    if not isinstance(block, dict):
        raise InputError("bad wavelength block", path=path, field=key,
                         expected="an object with polynomial_nm or values_nm and medium",
                         found=type(block).__name__)
    kwargs = {"medium": block.get("medium", "air")}
    for name in ("polynomial_nm", "values_nm"):
        if name in block:
            kwargs[name] = tuple(_number_list(block[name], path, f"{key}.{name}").tolist())
    try:
        return WavelengthAxis(**kwargs)
    except InputError as exc:
        field = exc.field or key
        if field.startswith("wavelength"):
            field = key + field[len("wavelength"):]
        raise InputError(exc.message, path=path, field=field, expected=exc.expected,
                         found=exc.found) from None


def _ro(a):
    a.setflags(write=False)
    return a


def read_sidecar(path) -> Sidecar:
    """Read and validate a sidecar JSON file.

    Raises
    ------
    InputError
        Unreadable JSON (with line and column), a missing required key, or a
        value out of range; the message names the file and the key.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("sidecar not found", path=path, expected="an existing JSON file",
                         found="nothing") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError("sidecar unreadable", path=path, found=" ".join(str(exc).split())) from None
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"invalid JSON: {exc.msg}", path=path, field=f"line {exc.lineno}, column {exc.colno}",
                         expected="valid JSON", found=repr(text[exc.pos:exc.pos + 20])) from None
    if not isinstance(doc, dict):
        raise InputError("sidecar is not an object", path=path, expected="a JSON object {...}",
                         found=type(doc).__name__)
    version = doc.get("lasecyto_sidecar", SIDECAR_VERSION)
    if version != SIDECAR_VERSION or isinstance(version, bool):
        raise InputError("unsupported sidecar version", path=path, field="lasecyto_sidecar",
                         expected=str(SIDECAR_VERSION), found=repr(version))
    for key in ("frame_times_s", "exposure_s"):
        if key not in doc:
            raise InputError("required key missing", path=path, field=key, expected="present", found="absent")
    times = _number_list(doc["frame_times_s"], path, "frame_times_s")
    steps = np.diff(times)
    if (steps <= 0).any():
        i = int(np.flatnonzero(steps <= 0)[0]) + 1
        raise InputError("frame times not strictly increasing", path=path, field=f"frame_times_s[{i}]",
                         expected=f"> {times[i - 1]:g}", found=f"{times[i]:g}")
    exposure = _number(doc["exposure_s"], path, "exposure_s", low=0.0)

    pump = doc.get("pump_energy_nj")
    if pump is not None:
        if isinstance(pump, list):
            pump = _number_list(pump, path, "pump_energy_nj", low=0.0)
        else:
            pump = np.full(times.size, _number(pump, path, "pump_energy_nj", low=0.0, strict=False))
        pump = _ro(pump)

    frame_exposure = doc.get("frame_exposure_s")
    if frame_exposure is not None:
        frame_exposure = _number_list(frame_exposure, path, "frame_exposure_s")
        if (frame_exposure <= 0).any():
            i = int(np.flatnonzero(frame_exposure <= 0)[0])
            raise InputError("bad list element", path=path, field=f"frame_exposure_s[{i}]",
                             expected="a finite number > 0", found=repr(float(frame_exposure[i])))
        frame_exposure = _ro(frame_exposure)

    cam = doc.get("camera", {})
    if cam is None:
        cam = {}
    if not isinstance(cam, dict):
        raise InputError("bad camera block", path=path, field="camera", expected="an object",
                         found=type(cam).__name__)
    frames = {}
    for key in ("dark_stack", "flat_stack"):
        value = cam.get(key)
        if value is None:
            frames[key] = None
        elif isinstance(value, str) and value.strip():
            frames[key] = (path.parent / value).resolve()
        else:
            raise InputError("bad camera frames entry", path=path, field=f"camera.{key}",
                             expected="a path (relative to the sidecar) of a stack of frames", found=repr(value))
    gain = cam.get("gain_counts_per_e", 1.0)
    gain_from_data = False
    if isinstance(gain, str):
        if gain != PHOTON_TRANSFER:
            raise InputError("bad value", path=path, field="camera.gain_counts_per_e",
                             expected=f"a number > 0 or {PHOTON_TRANSFER!r}", found=repr(gain))
        gain_from_data = frames["flat_stack"] is None
        gain = 1.0  # replaced by the measurement
    elif frames["flat_stack"] is not None and "gain_counts_per_e" in cam:
        raise InputError("gain given twice", path=path, field="camera.gain_counts_per_e",
                         expected=f"{PHOTON_TRANSFER!r} (or no flat_stack) when flat frames are named",
                         found=repr(gain))
    camera = CameraModel(
        offset_counts=_number(cam.get("offset_counts", 0.0), path, "camera.offset_counts"),
        gain_counts_per_e=_number(gain, path, "camera.gain_counts_per_e", low=0.0),
        read_noise_e=_number(cam.get("read_noise_e", 0.0), path, "camera.read_noise_e", low=0.0, strict=False),
        saturation_counts=_number(math.inf if cam.get("saturation_counts") is None else cam["saturation_counts"],
                                  path, "camera.saturation_counts", low=0.0, allow_inf=True),
        dark_stack=frames["dark_stack"], flat_stack=frames["flat_stack"], gain_from_data=gain_from_data,
    )
    axes = {}
    for key in ("wavelength", "wavelength_guess"):
        block = doc.get(key)
        axes[key] = None if block is None else _axis(block, path, key)
    return Sidecar(path=path, frame_times_s=_ro(times), exposure_s=exposure, pump_energy_nj=pump,
                   camera=camera, wavelength=axes["wavelength"], wavelength_guess=axes["wavelength_guess"],
                   frame_exposure_s=frame_exposure)


def check_sidecar(sidecar: Sidecar, stack) -> None:
    """Check that a sidecar fits its stack (frame count, pump values, explicit axis length).

    Raises
    ------
    InputError
        Naming the sidecar, the key, the expected and the found count.
    """
    n, name = stack.n_frames, stack.path.name
    m = len(sidecar.frame_times_s)
    if m != n:
        raise InputError("frame times do not match the stack", path=sidecar.path, field="frame_times_s",
                         expected=f"{n} values (one per frame of {name})", found=f"{m} values")
    if sidecar.pump_energy_nj is not None and len(sidecar.pump_energy_nj) != n:
        raise InputError("pump energies do not match the stack", path=sidecar.path, field="pump_energy_nj",
                         expected=f"one number or {n} values (one per frame of {name})",
                         found=f"{len(sidecar.pump_energy_nj)} values")
    if sidecar.frame_exposure_s is not None and len(sidecar.frame_exposure_s) != n:
        raise InputError("frame exposures do not match the stack", path=sidecar.path, field="frame_exposure_s",
                         expected=f"{n} values (one per frame of {name})",
                         found=f"{len(sidecar.frame_exposure_s)} values")
    for key in ("wavelength", "wavelength_guess"):
        axis = getattr(sidecar, key)
        if axis is not None and axis.n_pixels is not None and axis.n_pixels != stack.n_pixels:
            raise InputError("explicit axis does not match the stack", path=sidecar.path,
                             field=f"{key}.values_nm",
                             expected=f"{stack.n_pixels} values (one per pixel of {name})",
                             found=f"{axis.n_pixels} values")
