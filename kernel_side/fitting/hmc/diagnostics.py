"""MCMC convergence diagnostics (through arviz) and a plain-text summary of any posterior.

R-hat and effective sample sizes are arviz's rank-normalised split R-hat and bulk / tail
ESS (Vehtari et al. 2021, Bayesian Analysis 16:667). arviz is imported lazily: it is
slow to import and only sampling needs it.
"""
from __future__ import annotations

import warnings
from typing import Any

import numpy as np

__all__ = ["ConvergenceWarning", "SamplingInterruptedWarning", "chain_diagnostics"]

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


# ---------------------------------------------------------------------------- helpers
def _arviz():
    with warnings.catch_warnings():
        # arviz 0.2x announces its coming refactor on import.
        warnings.simplefilter("ignore", FutureWarning)
        import arviz

    return arviz
