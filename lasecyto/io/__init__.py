"""Readers, validation and atomic writers: spectral stacks, sidecars, manifests and tables.

This subpackage knows nothing of fitting or physics.  Stacks are read lazily
(TIFF is memory-mapped when possible), every bad input raises
:class:`lasecyto.exceptions.InputError` naming the file, the field, what was
expected and what was found, and every file is written atomically.
"""

from ._images import ImageStack, read_image_stack
from ._manifest import CellSpec, DishSpec, FieldSpec, LampSpec, Manifest, missing_files, read_manifest
from ._sidecar import CameraModel, Sidecar, check_sidecar, default_sidecar_path, read_sidecar
from ._stack import FORMATS, SpectralStack, read_stack
from ._parts import read_table_parts, write_part, write_table_parts
from ._write import atomic_path, file_sha256, read_table, write_json, write_table

__all__ = [
    "FORMATS",
    "CameraModel",
    "CellSpec",
    "DishSpec",
    "FieldSpec",
    "ImageStack",
    "LampSpec",
    "Manifest",
    "Sidecar",
    "SpectralStack",
    "atomic_path",
    "check_sidecar",
    "default_sidecar_path",
    "file_sha256",
    "missing_files",
    "read_image_stack",
    "read_manifest",
    "read_sidecar",
    "read_stack",
    "read_table",
    "read_table_parts",
    "write_json",
    "write_part",
    "write_table",
    "write_table_parts",
]
