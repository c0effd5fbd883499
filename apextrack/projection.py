"""Top views: one 2D image per timepoint from a 3D stack.

``max``: maximum-intensity projection along z. Further projections (a shell below the dome
surface) live here too.
"""

from __future__ import annotations

import numpy as np


def max_projection(volume: np.ndarray) -> np.ndarray:
    """Maximum projection of a ``(Z, Y, X)`` volume along z; a 2D image is returned unchanged.

    Examples
    --------
    >>> v = np.zeros((3, 4, 4)); v[1, 2, 2] = 5
    >>> float(max_projection(v)[2, 2])
    5.0
    """
    volume = np.asarray(volume)
    if volume.ndim == 2:
        return volume.astype(np.float32, copy=False)
    if volume.ndim != 3:
        raise ValueError(f"expected a (Z, Y, X) volume, got shape {volume.shape}")
    return volume.max(axis=0).astype(np.float32, copy=False)


def top_view(volume: np.ndarray, method: str = "max", **kwargs) -> np.ndarray:
    """Project one timepoint to a top view with the named method."""
    if method == "max" or volume.ndim == 2:
        return max_projection(volume)
    if method == "surface":
        from . import projection as _p

        fn = getattr(_p, "surface_projection", None)
        if fn is None:
            raise NotImplementedError("surface projection is not available")
        return fn(volume, **kwargs)[0]
    raise ValueError(f"unknown projection method {method!r}")
