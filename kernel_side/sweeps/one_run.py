"""One sweep run: build the data and network, fit the posterior, score it, attack it.

:func:`execute_run` is what a Dask worker executes, so this module imports only jostle's
compute code (no widget libraries). It never raises for a failing run: the failure comes
back as a record with ``status = "failed"`` and the traceback, so the other runs go on.

Determinism: each run holds torch to one intra-op thread while it runs (``torch_threads(1)``,
restoring the old count afterwards), so a seeded run gives bit-identical metrics in the
calling process and in a worker process, whose thread pools would otherwise reduce sums in
different orders.
"""
from __future__ import annotations

import importlib.metadata
import os
import platform
import socket
import tempfile
import time
import traceback
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import torch

from jostle import metrics as _metrics
from jostle.attacks.readouts import softmax_robustness
from jostle.attacks.run import attack as run_attack
from jostle.certify.certificate import certify
from jostle.common.threads import torch_threads
from jostle.files.posterior_file import jsonable
from jostle.sweeps import networks
from jostle.sweeps.data_sources import cut, load_source, source_of
from jostle.sweeps.spec import CERTIFY_DEFAULT, fit_function, gradient_sample_counts, run_key

__all__ = ["execute_run", "fit_run", "evaluate", "gradient_readout", "certified_scores", "load_run_data",
           "build_network", "software_versions", "GRADIENT_STATISTICS"]

#: the read-out's statistics per sample count, in the store's column order
GRADIENT_STATISTICS = ("l2_mean", "l2_median", "l2_p90", "linf_mean", "linf_median", "linf_p90", "abs_mean")


def execute_run(config: dict, save_ensemble: bool = False, source=None) -> dict:
    """Fit and evaluate one run; return a record for the store (never raises for run errors).

    Parameters
    ----------
    config : dict
        A run configuration from :func:`jostle.sweeps.spec.expand` (keys ``data``,
        ``architecture``, ``method``, ``seed``, ``evaluation``).
    save_ensemble : bool
        Also return the fitted ensemble as safetensors bytes (``record["ensemble_bytes"]``),
        for the process that owns the store to write beside it.
    source : Dataset, optional
        The run's data source already loaded (:func:`jostle.sweeps.data_sources.source_of`):
        on a cluster, the data set the sweep sent to every worker once. None loads it here.

    Returns
    -------
    dict
        ``key``, ``config``, ``status`` (``"ok"`` or ``"failed"``), ``metrics``, ``error``,
        ``traceback``, ``fit_seconds``, ``eval_seconds``, ``started``, ``finished``,
        ``worker``, ``versions``, ``warnings`` (the run's warnings as text, e.g. an HMC
        convergence warning; they are recorded, not shown) and ``ensemble_bytes`` (or None).
    """
    record: dict[str, Any] = {
        "key": run_key(config), "config": config, "status": "failed", "metrics": None,
        "error": None, "traceback": None, "fit_seconds": None, "eval_seconds": None,
        "started": time.time(), "finished": None, "worker": f"{socket.gethostname()}:{os.getpid()}",
        "versions": software_versions(), "ensemble_bytes": None,
    }
    caught: list = []
    try:
        with torch_threads(1), warnings.catch_warnings(record=True) as caught:
            # Kept with the run (a convergence warning is a result), not printed on a worker.
            warnings.simplefilter("always")
            _fit_and_score(config, save_ensemble, record, source)
    except Exception as err:  # a failing run is data, not a crash of the sweep
        record["error"] = f"{type(err).__name__}: {err}".splitlines()[0][:500]
        record["traceback"] = traceback.format_exc()
    finally:
        record["finished"] = time.time()
        record["warnings"] = sorted({f"{w.category.__name__}: {w.message}" for w in caught or []})
    return record


def fit_run(config: dict, source=None):
    """Build the run's data and network and fit its posterior; returns ``(ensemble, data)``.

    ``source``: the run's data source already loaded, as in :func:`execute_run`."""
    data = load_run_data(config["data"], source)
    net = build_network(config["architecture"], data)
    method = dict(config["method"])
    name = method.pop("name")
    fit = fit_function(name)
    if "progress" in fit.training_options:
        method["progress"] = False  # one bar for the whole sweep, not one per fit
    ens = fit(net, data, seed=config["seed"], **method)
    ens.meta.setdefault("method", name)
    ens.meta["run"] = {"key": run_key(config), "config": config}
    return ens, data


def evaluate(ens, data, evaluation: dict, seed: int = 0) -> dict:
    """Test accuracy, NLL and ECE, then for each attack and budget the success rate and
    softmax robustness on the first ``evaluation["points"]`` test points, and for each budget
    the certified accuracy of the same points (:func:`certified_scores`).

    Returns
    -------
    dict
        ``accuracy``, ``nll``, ``ece``, ``members``, ``attacks``: a list of dicts with
        ``attack`` (label), ``method``, ``norm``, ``steps``, ``samples``, ``budget``,
        ``success_rate`` and ``robustness``, and ``certified``: a list of dicts with
        ``budget``, ``norm``, ``method``, ``certified_accuracy`` and ``members_certified``
        (empty with ``evaluation["certify"]`` None, or for a template certify does not support,
        which the run records as a warning).
    """
    # float64 and renormalised: float32 rows miss 1 by ~1e-7, which scikit-learn's log loss flags
    probs = ens.predict(data.x_test).probs.double()
    probs = probs / probs.sum(1, keepdim=True)
    scores = {
        "accuracy": _metrics.accuracy(probs, data.y_test),
        "nll": _metrics.nll(probs, data.y_test),
        "ece": _metrics.ece(probs, data.y_test, n_bins=evaluation["ece_bins"]),
        "members": len(ens),
    }
    points = min(evaluation["points"], int(data.x_test.shape[0]))
    x = data.x_test[:points]
    y = data.y_test[:points] if evaluation["target"] == "true" else None
    rows = []
    for attack in evaluation["attacks"]:
        samples = None if attack["samples"] is None else min(attack["samples"], len(ens))
        for budget in evaluation["budgets"]:
            adv = run_attack(ens, x, y, method=attack["method"], eps=budget, norm=attack["norm"],
                             steps=attack["steps"], samples=samples, objective=attack["objective"],
                             seed=seed)
            rows.append({
                "attack": attack["label"], "method": attack["method"], "norm": attack["norm"],
                "steps": attack["steps"], "samples": samples, "budget": budget,
                "success_rate": float(torch.as_tensor(adv.success).double().mean()),
                "robustness": float(softmax_robustness(ens, x, adv.x_adv)),
            })
    scores["attacks"] = rows
    scores["certified"] = certified_scores(ens, x, data.y_test[:points], evaluation)
    tick = time.perf_counter()
    scores["gradients"] = gradient_readout(ens, x, y, gradient_sample_counts(evaluation, len(ens)), seed=seed)
    scores["gradient_seconds"] = time.perf_counter() - tick
    return scores


def gradient_readout(ens, x, y, sample_counts, seed: int = 0) -> list[dict]:
    """Size of the expected loss gradient in the input at several sample counts, and of single members'.

    The members are taken in one seeded random order (``torch.randperm`` with a generator
    seeded by ``seed``, the order of :meth:`jostle.Ensemble.subset`); the S-sample expected
    gradient averages the first S of them. Every member's gradient comes from one pass of the
    gradient engine (:meth:`jostle.Ensemble.member_input_grads`) and each S is a prefix mean,
    since the gradient of the mean loss is the mean of the members' gradients.

    Parameters
    ----------
    ens : Ensemble
    x : Tensor of shape (n_points, *input_shape)
    y : Tensor of shape (n_points,), optional
        Labels; None takes the whole ensemble's predicted labels (the same for every S).
    sample_counts : sequence of int
        Each between 1 and ``len(ens)``.
    seed : int

    Returns
    -------
    list of dict
        Per sample count two rows, ``which = "expected"`` (statistics over points of the
        S-sample expected gradient) and ``which = "member"`` (over the S members and the
        points, each member's own gradient), with ``samples`` and :data:`GRADIENT_STATISTICS`:
        L2 and L-inf norms' mean, median and 90th percentile, and the mean absolute component.
    """
    counts = sorted({int(s) for s in sample_counts})
    if not counts or counts[0] < 1 or counts[-1] > len(ens):
        raise ValueError(f"sample_counts must lie in [1, {len(ens)}]; got {list(sample_counts)}")
    order = torch.randperm(len(ens), generator=torch.Generator().manual_seed(int(seed)))[:counts[-1]]
    grads = ens.member_input_grads(x, y, members=order).flatten(2).double()  # [S_max, N, D]
    prefix = grads.cumsum(0)
    member_l2, member_linf = grads.norm(dim=-1), grads.abs().amax(dim=-1)  # [S_max, N]
    member_abs = grads.abs().mean(dim=(1, 2))  # [S_max]
    rows = []
    for count in counts:
        mean = prefix[count - 1] / count
        rows.append(_gradient_row(count, "expected", mean.norm(dim=-1), mean.abs().amax(dim=-1),
                                  float(mean.abs().mean())))
        rows.append(_gradient_row(count, "member", member_l2[:count], member_linf[:count],
                                  float(member_abs[:count].mean())))
    return rows


def certified_scores(ens, x, y, evaluation: dict) -> list[dict]:
    """Per budget: the share of points whose posterior predictive is certified and correct.

    ``certified_accuracy`` is the share of points where :func:`jostle.certify` proves that the
    predictive keeps its label over the ball (``evaluation["certify"]``'s norm, intersected with
    the data bounds) and that label is the true one; ``members_certified`` is the mean over
    points of the share of members certified (each keeps its own label). A certified point is
    one no attack can flip, so the certified accuracy never exceeds the accuracy under any
    attack in that norm and budget.
    """
    settings = evaluation.get("certify", CERTIFY_DEFAULT)
    if not settings:  # ``certify = false`` in the sweep file
        return []
    rows = []
    for budget in evaluation["budgets"]:
        try:
            cert = certify(ens, x, eps=budget, norm=settings["norm"], method=settings["method"], threads=None)
        except ValueError as err:  # e.g. a GELU network: recorded with the run, the attacks still count
            warnings.warn(f"certified accuracy not computed: {err}", UserWarning, stacklevel=2)
            return []
        correct = cert.predictive & (cert.label == y.to(cert.label.device))
        rows.append({"budget": budget, "norm": settings["norm"], "method": settings["method"],
                     "certified_accuracy": float(correct.double().mean()),
                     "members_certified": float(cert.share.double().mean())})
    return rows


def load_run_data(spec: dict, source=None):
    """The run's :class:`~jostle.Dataset`: its source (loaded here unless given; a file is checked
    against its recorded sha256) with the first ``n_train`` training points where the source is
    made whole (``digits``, ``meter_cards``, files)."""
    if source is None:
        source = load_source(source_of(spec))
    return cut(source, spec)


def build_network(spec: dict, data) -> torch.nn.Module:
    """The run's network for the data's shape (:func:`jostle.sweeps.networks.build_network`): an
    MLP with ``depth`` hidden layers of ``width`` units, a registered builder, or your own function."""
    return networks.build_network(spec, data)


def software_versions() -> dict:
    return {"jostle": importlib.metadata.version("jostle"), "torch": torch.__version__, "numpy": np.__version__,
            "python": platform.python_version()}


def _gradient_row(count: int, which: str, l2, linf, abs_mean: float) -> dict:
    l2, linf = l2.flatten().numpy(), linf.flatten().numpy()
    row: dict = {"samples": count, "which": which}
    for name, values in (("l2", l2), ("linf", linf)):
        row[f"{name}_mean"] = float(values.mean())
        row[f"{name}_median"] = float(np.median(values))
        row[f"{name}_p90"] = float(np.percentile(values, 90))  # linear interpolation, numpy's default
    row["abs_mean"] = abs_mean
    return row


def _ensemble_bytes(ens, config: dict) -> bytes:
    with tempfile.TemporaryDirectory(prefix="jostle-run-") as folder:
        path = Path(folder) / "posterior.safetensors"
        ens.save(str(path))
        return path.read_bytes()


def _fit_and_score(config: dict, save_ensemble: bool, record: dict, source=None) -> None:
    tick = time.perf_counter()
    ens, data = fit_run(config, source)
    record["fit_seconds"] = time.perf_counter() - tick
    tick = time.perf_counter()
    record["metrics"] = evaluate(ens, data, config["evaluation"], seed=config["seed"])
    if ens.meta.get("diagnostics") is not None:  # e.g. HMC acceptance, divergences, R-hat, ESS
        record["metrics"]["diagnostics"] = jsonable(ens.meta["diagnostics"])
    record["eval_seconds"] = time.perf_counter() - tick
    if save_ensemble:
        record["ensemble_bytes"] = _ensemble_bytes(ens, config)
    record["status"] = "ok"
