"""Depth layer from a sample's depth range, the study's layers and the bottom depth."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

NEAR_BOTTOM = "near_bottom"
INTEGRATED = "integrated"


def tag_depth_layer(
    depth_min_m: pd.Series | np.ndarray,
    depth_max_m: pd.Series | np.ndarray,
    bottom_depth_m: pd.Series | np.ndarray | None,
    layers: Sequence[object],
    near_bottom_m: float,
    on_bottom: pd.Series | np.ndarray | None = None,
) -> np.ndarray:
    """Depth layer name of each sample.

    Rules (in order): a sample whose whole range lies within ``near_bottom_m`` above the
    bottom depth and in the lower half of the water column, or that is known to be on the
    bottom (``on_bottom``), is "near_bottom";
    a point depth d is in the layer with top <= d < bottom; a range is in the layer that
    holds it whole (top <= depth_min and depth_max <= bottom); a range spanning two or
    more layers is "integrated". Depths below the deepest layer or missing give null.

    Parameters
    ----------
    depth_min_m, depth_max_m
        Sample depth range in metres below the surface (equal for a point sample).
    bottom_depth_m
        Water depth at the sample, or None.
    layers
        Objects with ``name``, ``top_m`` and ``bottom_m``, contiguous from 0.
    near_bottom_m
        Distance above the bottom within which a sample counts as near the bottom.
    on_bottom
        Optional boolean mask of samples taken on the bottom whatever their recorded depth.
    """
    dmin = np.asarray(depth_min_m, dtype=float)
    dmax = np.asarray(depth_max_m, dtype=float)
    n = dmin.shape[0]
    tops = np.array([layer.top_m for layer in layers], dtype=float)
    bottoms = np.array([layer.bottom_m for layer in layers], dtype=float)
    names = np.array([layer.name for layer in layers] + [None], dtype=object)

    # Layer index of the top and bottom of the range; the bottom of a range is allowed to
    # touch a layer's lower boundary (depth_max <= bottom_m), a point depth is not.
    i_min = np.searchsorted(bottoms, dmin, side="right")
    i_max = np.searchsorted(bottoms, dmax, side="left")
    point = dmin == dmax
    i_max = np.where(point, i_min, i_max)
    beyond = (i_min >= len(layers)) | (i_max >= len(layers)) | (dmin < tops[0])
    known = np.isfinite(dmin) & np.isfinite(dmax) & ~beyond

    out = np.full(n, None, dtype=object)
    same = known & (i_min == i_max)
    out[same] = names[i_min[same]]
    out[known & (i_min != i_max)] = INTEGRATED

    near = np.zeros(n, dtype=bool)
    if bottom_depth_m is not None:
        bottom = np.asarray(bottom_depth_m, dtype=float)
        # the range must also lie in the lower half of the water column: at a station shallower
        # than near_bottom_m a tow from the surface samples the whole column, not the water
        # over the bottom (common practice)
        with np.errstate(invalid="ignore"):
            near = (np.isfinite(bottom) & np.isfinite(dmin) & (dmin >= bottom - near_bottom_m)
                    & (dmin >= bottom / 2.0))
    if on_bottom is not None:
        near = near | np.asarray(on_bottom, dtype=bool)
    out[near] = NEAR_BOTTOM
    return out
