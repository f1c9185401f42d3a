"""A plain-text account of how a posterior was made, read from its metadata."""
from __future__ import annotations

import math

__all__ = ["describe"]


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
