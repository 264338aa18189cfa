"""Input/output layer: read masks into :class:`Volume` objects, affine maths, atomic writes.

This is the only layer that reads files or affines; everything downstream works on arrays in mm.
"""

from vesselgeom.io.affine import (
    affine_from_spacing,
    check_spacing,
    index_to_world,
    orientation,
    validate_affine,
    voxel_sizes,
    voxel_volume,
    world_to_index,
)
from vesselgeom.io.atomic import atomic_output_dir, atomic_write_text
from vesselgeom.io.nifti import file_sha256, load_nifti
from vesselgeom.io.volume import INPUT_UNITS, Volume, select_foreground, volume_from_array

__all__ = [
    "INPUT_UNITS",
    "Volume",
    "affine_from_spacing",
    "atomic_output_dir",
    "atomic_write_text",
    "check_spacing",
    "index_to_world",
    "file_sha256",
    "load_nifti",
    "orientation",
    "select_foreground",
    "validate_affine",
    "volume_from_array",
    "voxel_sizes",
    "voxel_volume",
    "world_to_index",
]
