"""jostle: how a Bayesian neural network's posterior predictive holds up under attack."""
from __future__ import annotations

from . import datasets, metrics
from .datasets import Dataset
from .ensemble import DEFAULT_MEMORY_BUDGET, Ensemble
from .models import build_architecture, init_parameters, mlp, register_architecture
from .prediction import Prediction, entropy
from .storage import FormatError, load
from .demo_data import DEMO_POSTERIORS, demo_posterior
from .diagnostics import ConvergenceWarning, SamplingInterruptedWarning, describe
from .hmc import HMCDraws, HMCState, sample_hmc
from .hmc_fit import fit_hmc
from .attack_core import AttackResult
from .attack_gradient import attack
from .masking import MaskingReport, masking_check
from .robustness import (GradientFade, MinimalBudget, expected_gradient, gradient_fade, minimal_budget,
                         softmax_robustness)
from .dropout import fit_dropout
from .training import fit_deep_ensemble, fit_map
from .bayes_by_backprop import VariationalPosterior, fit_vi
from .variational import fit_mean_field
from .laplace import LastLayerLaplace, fit_laplace
from .sweep import Sweep, SweepSummary
from .sweep_config import SweepConfigError

__version__ = "0.1.0"

__all__ = [
    "DEMO_POSTERIORS",
    "demo_posterior",
    "ConvergenceWarning",
    "HMCDraws",
    "HMCState",
    "SamplingInterruptedWarning",
    "describe",
    "fit_hmc",
    "sample_hmc",
    "AttackResult",
    "attack",
    "expected_gradient",
    "gradient_fade",
    "GradientFade",
    "masking_check",
    "MaskingReport",
    "minimal_budget",
    "MinimalBudget",
    "softmax_robustness",
    "DEFAULT_MEMORY_BUDGET",
    "Dataset",
    "Ensemble",
    "FormatError",
    "LastLayerLaplace",
    "Prediction",
    "VariationalPosterior",
    "build_architecture",
    "datasets",
    "entropy",
    "fit_deep_ensemble",
    "fit_dropout",
    "fit_laplace",
    "fit_map",
    "fit_mean_field",
    "fit_vi",
    "init_parameters",
    "load",
    "metrics",
    "mlp",
    "register_architecture",
    "Sweep",
    "SweepConfigError",
    "SweepSummary",
]
