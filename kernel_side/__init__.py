"""jostle: how a Bayesian neural network's posterior predictive holds up under attack."""
from __future__ import annotations

from jostle import datasets, metrics
from jostle.attacks.gradient_pictures import GradientPictures, dataset_gradients, gradient_pictures
from jostle.attacks.masking import MaskingReport, masking_check
from jostle.attacks.problem import AttackResult
from jostle.attacks.readouts import (
                         GradientFade,
                         MinimalBudget,
                         expected_gradient,
                         gradient_fade,
                         minimal_budget,
                         softmax_robustness,
)
from jostle.attacks.run import AttackSpec, attack, register_attack, unregister_attack
from jostle.certify.certificate import Certificate, CertifiedRadius, certified_radius, certify
from jostle.datasets import Dataset
from jostle.files.posterior_file import FormatError
from jostle.fitting.dropout import fit_dropout
from jostle.fitting.hmc.diagnostics import ConvergenceWarning, SamplingInterruptedWarning
from jostle.fitting.hmc.fit import fit_hmc
from jostle.fitting.hmc.sampler import HMCDraws, HMCState, sample_hmc
from jostle.fitting.laplace import LastLayerLaplace, fit_laplace
from jostle.fitting.point_estimates import fit_deep_ensemble, fit_map
from jostle.fitting.sgmcmc.fit import fit_sgmcmc
from jostle.fitting.sgmcmc.kernel import SGMCMCDraws, sample_sgmcmc
from jostle.fitting.variational import VariationalPosterior, fit_vi
from jostle.posterior.architectures import build_architecture, cnn, init_parameters, mlp, register_architecture
from jostle.posterior.demo_posteriors import DEMO_POSTERIORS, demo_posterior
from jostle.posterior.description import describe
from jostle.posterior.ensemble import DEFAULT_MEMORY_BUDGET, Ensemble
from jostle.posterior.loading import load
from jostle.posterior.prediction import Prediction, entropy
from jostle.sweeps.spec import SweepConfigError
from jostle.sweeps.sweep import Sweep, SweepSummary

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
    "Certificate",
    "CertifiedRadius",
    "certified_radius",
    "certify",
    "attack",
    "AttackSpec",
    "register_attack",
    "unregister_attack",
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
    "fit_vi",
    "init_parameters",
    "load",
    "metrics",
    "mlp",
    "register_architecture",
    "Sweep",
    "SweepConfigError",
    "SweepSummary",
    "GradientPictures",
    "gradient_pictures",
    "dataset_gradients",
    "fit_sgmcmc",
    "sample_sgmcmc",
    "SGMCMCDraws",
    "cnn",
]
