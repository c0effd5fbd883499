"""Phyllotaxis models and synthetic microscopy.

- :mod:`~apextrack.model.growth`: primordium histories (births, outward drift, growth).
- :mod:`~apextrack.model.render`: a dome, reporter blobs, PSF, noise, bleaching, motion.
- :mod:`~apextrack.model.synthetic`: :func:`make_synthetic_stack`, :func:`write_synthetic`,
  :func:`demo_stack_path`.
"""

from .growth import (GOLDEN_ANGLE_DEG, Growth, history_from_births, intrinsic_truth,
                     regular_history)
from .synthetic import (DEMO_FILES, SyntheticStack, demo_stack_path, make_synthetic_stack,
                        write_synthetic)

__all__ = ["GOLDEN_ANGLE_DEG", "Growth", "history_from_births", "intrinsic_truth",
           "regular_history", "SyntheticStack", "make_synthetic_stack", "write_synthetic",
           "demo_stack_path", "DEMO_FILES"]
