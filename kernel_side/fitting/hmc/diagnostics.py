"""MCMC convergence diagnostics (through arviz) and a plain-text summary of any posterior.

R-hat and effective sample sizes are arviz's rank-normalised split R-hat and bulk / tail
ESS (Vehtari et al. 2021, Bayesian Analysis 16:667). arviz is imported lazily: it is
slow to import and only sampling needs it.
"""
from __future__ import annotations

import math
import warnings
from typing import Any

import numpy as np

__all__ = ["ConvergenceWarning", "SamplingInterruptedWarning", "chain_diagnostics", "describe"]

#: common-practice thresholds: R-hat below 1.01, bulk ESS above 100 per chain
RHAT_LIMIT = 1.01
ESS_PER_CHAIN = 100


class ConvergenceWarning(UserWarning):
    """The sampler's own diagnostics say the draws may not represent the posterior."""


class SamplingInterruptedWarning(UserWarning):
    """Sampling was stopped early (KeyboardInterrupt); the draws so far were returned."""


def chain_diagnostics(values: Any) -> dict[str, np.ndarray]:
    """R-hat, bulk ESS and tail ESS of each quantity across chains.

    Parameters
    ----------
    values : array of shape (C, T) or (C, T, K)
        T draws from each of C chains of one quantity, or of K quantities.

    Returns
    -------
    dict with ``rhat``, ``ess_bulk``, ``ess_tail``: arrays of shape () or (K,)

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> found = chain_diagnostics(rng.normal(size=(4, 500)))
    >>> bool(found["rhat"] < 1.01)
    True
    """
    array = np.asarray(values, dtype=np.float64)
    if array.ndim not in (2, 3):
        raise ValueError(f"values must have shape (C, T) or (C, T, K); got shape {array.shape}")
    if array.shape[1] < 4:
        raise ValueError(f"values must hold at least 4 draws per chain; got {array.shape[1]}")
    scalar = array.ndim == 2
    if scalar:
        array = array[:, :, None]
    az = _arviz()
    dataset = az.convert_to_dataset(array)
    with warnings.catch_warnings():
        # Constant quantities make arviz divide by zero; they come back as NaN.
        warnings.simplefilter("ignore", RuntimeWarning)
        found = {
            "rhat": az.rhat(dataset)["x"].values,
            "ess_bulk": az.ess(dataset, method="bulk")["x"].values,
            "ess_tail": az.ess(dataset, method="tail")["x"].values,
        }
    return {key: (value[0] if scalar else value) for key, value in found.items()}


def describe(ensemble) -> str:
    """A plain-text account of how a posterior ensemble was made and how far to trust it.

    Shows the method, size, time taken and whatever the fit recorded; for HMC the
    acceptance rate, divergences, step size, and R-hat / ESS of the function-space
    quantities (train log-likelihood, test-set predicted probabilities).
    """
    meta = ensemble.meta
    lines = [f"{meta.get('method', 'unspecified')} posterior: {len(ensemble)} members, "
             f"{ensemble.num_parameters} parameters each"]
    arch = meta.get("architecture")
    if arch:
        lines.append(f"  architecture: {arch.get('builder')} {_compact(arch.get('kwargs', {}))}")
    if "data" in meta and isinstance(meta["data"], dict):
        lines.append(f"  data: {meta['data'].get('name')} ({meta['data'].get('n_train')} training points)")
    if "seconds" in meta:
        lines.append(f"  time taken: {meta['seconds']:.1f} s")
    if "seed" in meta:
        lines.append(f"  seed: {meta['seed']}")
    if isinstance(meta.get("diagnostics"), dict):
        lines += _hmc_lines(meta["diagnostics"]) if meta.get("method") == "hmc" else _plain_lines(meta["diagnostics"])
    if isinstance(meta.get("hyperparameters"), dict):
        lines.append(f"  settings: {_compact(meta['hyperparameters'])}")
    return "\n".join(lines)


# ---------------------------------------------------------------------------- helpers
def _arviz():
    with warnings.catch_warnings():
        # arviz 0.2x announces its coming refactor on import.
        warnings.simplefilter("ignore", FutureWarning)
        import arviz

    return arviz


def _hmc_lines(d: dict) -> list[str]:
    lines = []
    if "accept_rate" in d:
        rates = ", ".join(f"{r:.2f}" for r in d["accept_rate"])
        lines.append(f"  acceptance (per chain): {rates}  (target {d.get('target_accept', float('nan')):.2f})")
    if "divergences" in d:
        lines.append(f"  divergences after warm-up: {d['divergences']} of {d.get('transitions', '?')} transitions")
    steps = d.get("step_size")
    if steps and len(set(steps)) == 1:
        lines.append(f"  step size (shared by the chains): {steps[0]:.3g}")
    elif steps:
        lines.append("  step size (per chain): " + ", ".join(f"{s:.3g}" for s in steps))
    for name, label in (("train_log_likelihood", "train log-likelihood"), ("test_probs", "test-set probabilities")):
        entry = d.get(name)
        if isinstance(entry, dict):
            lines.append(f"  {label}: " + _compact({k: _rounded(v) for k, v in entry.items()}))
    if d.get("problems"):
        lines.append("  WARNING: " + "; ".join(d["problems"]))
    elif d.get("checks"):
        lines.append("  checks passed: " + "; ".join(d["checks"]))
    elif "problems" in d:
        lines.append("  no failed checks recorded (this file does not say which checks ran)")
    return lines


def _plain_lines(d: dict) -> list[str]:
    return [f"  {key}: {_rounded(value)}" for key, value in d.items()]


def _rounded(value):
    if isinstance(value, float):
        return float(f"{value:.4g}") if math.isfinite(value) else value
    if isinstance(value, list):
        return [_rounded(v) for v in value]
    return value


def _compact(record: dict) -> str:
    return ", ".join(f"{key}={value}" for key, value in record.items())
