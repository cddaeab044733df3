"""Model fits: spatial receptive-field models (:mod:`map2d.fit.spatial`)."""

from .spatial import (FIT_COLUMNS, MODELS, SpatialFit, fit_dog, fit_gabor, fit_gaussian, fit_map,
                      fit_maps, remove_pixel_box)

__all__ = ["SpatialFit", "fit_gaussian", "fit_dog", "fit_gabor", "fit_map", "fit_maps",
           "FIT_COLUMNS", "MODELS", "remove_pixel_box"]
