"""Phyllotaxis models and synthetic microscopy.

- :mod:`~apextrack.model.growth`: primordium histories (births, outward drift, growth).
- :mod:`~apextrack.model.render`: a dome, reporter blobs, PSF, noise, bleaching, motion.
- :mod:`~apextrack.model.synthetic`: :func:`make_synthetic_stack`, :func:`write_synthetic`,
  :func:`demo_stack_path`.
- :mod:`~apextrack.model.simulate`: the inhibitory-field (Douady–Couder) model.
- :mod:`~apextrack.model.patterns`: named patterns as analysis-ready results,
  :func:`simulate_pattern`, :func:`run_simulation`.
- :mod:`~apextrack.model.sweep`: bifurcation table and figure.
- :mod:`~apextrack.model.fit`: model parameters that match an imaging result.
"""

from .growth import (GOLDEN_ANGLE_DEG, Growth, history_from_births, intrinsic_truth,
                     regular_history)
from .synthetic import (DEMO_FILES, SyntheticStack, demo_stack_path, make_synthetic_stack,
                        write_synthetic)
from .simulate import (LUCAS_ANGLE_DEG, ModelParams, Simulation, classify, divergence_angles,
                       limit_angle_deg, simulate, steady_state)
from .patterns import (PATTERNS, SimulatedResult, load_params, render_simulation, run_simulation,
                       simulate_pattern)
from .sweep import bifurcation_figure, branch_jumps, sweep
from .fit import FitResult, fit_model

__all__ = ["GOLDEN_ANGLE_DEG", "Growth", "history_from_births", "intrinsic_truth",
           "regular_history", "SyntheticStack", "make_synthetic_stack", "write_synthetic",
           "demo_stack_path", "DEMO_FILES", "LUCAS_ANGLE_DEG", "ModelParams", "Simulation",
           "classify", "divergence_angles", "limit_angle_deg", "simulate", "steady_state",
           "PATTERNS", "SimulatedResult", "load_params", "render_simulation", "run_simulation", "simulate_pattern",
           "bifurcation_figure", "branch_jumps", "sweep", "FitResult", "fit_model"]
