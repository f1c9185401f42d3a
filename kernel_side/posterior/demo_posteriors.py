"""Small pre-fitted posteriors shipped with jostle so the first tour opens at once.

The files in ``jostle/data`` are made by ``scripts/make_demo_posteriors.py`` from fixed
seeds; each records in its metadata the recipe that made it (``meta["demo"]``), so it
can be regenerated and checked. They belong to the demo scenario (Kestrel Vale Water's
leak alarm, synthetic data) and are not fits of any real system.
"""
from __future__ import annotations

from importlib import resources
from pathlib import Path

import torch

from jostle.common.checks import show_value
from jostle.posterior.loading import load

__all__ = ["DEMO_POSTERIORS", "demo_posterior", "demo_posterior_path"]

#: shipped posterior name -> what it is
DEMO_POSTERIORS = {
    "leak_alarm_hmc": "HMC posterior (4 chains, 100 draws) of a 2-16-16-2 tanh net on jostle.datasets.leak_alarm()",
    "leak_alarm_map": "deterministic net (S = 1, penalised maximum likelihood), same architecture and data",
}


def demo_posterior(name: str = "leak_alarm_hmc", device: torch.device | str | None = None):
    """Load one of the posteriors that ship with jostle.

    Parameters
    ----------
    name : str
        One of ``DEMO_POSTERIORS``: ``"leak_alarm_hmc"`` or ``"leak_alarm_map"``.
    device : torch device, optional

    Returns
    -------
    Ensemble
        Fitted on ``jostle.datasets.leak_alarm()`` (its default arguments); ``meta["demo"]``
        holds the recipe (seed, settings) of ``scripts/make_demo_posteriors.py``.

    Examples
    --------
    >>> ens = demo_posterior("leak_alarm_map")
    >>> len(ens), ens.classes
    (1, ['steady', 'leak'])
    """
    return load(Path(str(demo_posterior_path(name))), device=device)


def demo_posterior_path(name: str):
    """The installed file of a shipped posterior (a ``pathlib.Path``-like resource)."""
    if name not in DEMO_POSTERIORS:
        raise ValueError(f"name must be one of {sorted(DEMO_POSTERIORS)}; got {show_value(name)}")
    path = resources.files("jostle") / "data" / f"{name}.safetensors"
    if not path.is_file():
        raise FileNotFoundError(f"the shipped posterior {name!r} is missing at {path}; "
                                f"regenerate it with scripts/make_demo_posteriors.py or reinstall jostle")
    return path
