"""Files people open in other tools: TIFF map stacks (ImageJ, OME-TIFF) and imaging field-of-view maps."""

from map2d.export.fov import PROPERTY_INFO, fov_planes, read_fov, write_fov
from map2d.export.tiff import (
    OME_NAMESPACE,
    plane_labels,
    read_maps_ome_tiff,
    read_maps_tiff,
    write_maps_ome_tiff,
    write_maps_tiff,
)

__all__ = [
    "write_maps_tiff",
    "write_maps_ome_tiff",
    "read_maps_tiff",
    "read_maps_ome_tiff",
    "plane_labels",
    "OME_NAMESPACE",
    "write_fov",
    "read_fov",
    "fov_planes",
    "PROPERTY_INFO",
]
