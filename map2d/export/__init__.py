"""Files people open in other tools: TIFF map stacks (ImageJ, OME-TIFF) and imaging field-of-view maps."""

from map2d.export import fov, tiff
from map2d.export.fov import *   # noqa: F401,F403 -- the names in fov.__all__
from map2d.export.tiff import *  # noqa: F401,F403 -- the names in tiff.__all__

__all__ = [*tiff.__all__, *fov.__all__]
