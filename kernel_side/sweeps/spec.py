"""Checking and expanding sweep definitions into one configuration dict per run.

A sweep is a grid over data sets, architectures, posterior methods (with their
hyper-parameters), training sizes and seeds, plus one evaluation block shared by every
run. Definitions come from Python keyword arguments or from a TOML file with the same
fields; either way every key is checked here and a bad one is refused with a message that
names it, e.g. ``sweep.methods[2]: unknown method 'mcmc'``.

Data sets are built-in names or files read by jostle's loaders
(:mod:`jostle.sweeps.data_sources`); architectures are the depth-width MLP, a registered
builder, or your own ``module:function`` (:mod:`jostle.sweeps.networks`). Each file is hashed
(sha256) when the sweep is checked, and each builder or function is built once for each data
set, so a missing file, a function that cannot be imported or one that returns no
``nn.Module`` is refused here, naming its key.
"""
from __future__ import annotations

import hashlib
import inspect
import itertools
import json
import math
import os
from pathlib import Path
from typing import Any

try:
    import tomllib
except ImportError:  # Python 3.10: the same parser, published as tomli
    import tomli as tomllib

from jostle.attacks.run import attack_names, attack_spec, resolve_settings
from jostle.fitting.dropout import fit_dropout
from jostle.fitting.hmc.fit import fit_hmc
from jostle.fitting.laplace import fit_laplace
from jostle.fitting.point_estimates import fit_deep_ensemble, fit_map
from jostle.fitting.sgmcmc.fit import fit_sgmcmc
from jostle.fitting.variational import fit_vi
from jostle.posterior.architectures import ACTIVATIONS
from jostle.sweeps.data_sources import (
    BUILTIN_DATASETS,
    FILE_FORMATS,
    PATH_ARGUMENTS,
    TORCH_FORMAT,
    arrays_sha256,
    builtin_loader,
    content_sha256,
    data_label,
    file_loader,
    load_source,
    source_of,
    without_paths,
)
from jostle.sweeps.networks import DATA_ARGUMENTS, build_network, factory_of, resolve_callable

__all__ = [
    "SweepConfigError", "FITS", "METHODS", "DETERMINISTIC_METHODS", "DATASETS",
    "run_key", "canonical_json", "read_toml", "check_sweep", "expand", "check_run", "fit_function",
    "DEFAULT_GRADIENT_SAMPLES", "gradient_sample_counts",
]

#: posterior method -> the jostle function that fits it
FITS = {
    "map": fit_map,
    "deep_ensemble": fit_deep_ensemble,
    "dropout": fit_dropout,
    "vi": fit_vi,
    "laplace": fit_laplace,
    "hmc": fit_hmc,
    "sgmcmc": fit_sgmcmc,
}
#: posterior method -> the name of that function (as exported by jostle)
METHODS: dict[str, str] = {name: fit.__name__ for name, fit in FITS.items()}
#: methods that give a single network (S = 1); every other method is Bayesian
DETERMINISTIC_METHODS = ("map",)
#: built-in data sets a sweep names by ``name``; files come as ``{"format": ..., <path>: ...}``
DATASETS = BUILTIN_DATASETS
_TARGETS = ("predicted", "true")
# Attack steps when the sweep does not say: this many, or fewer where the method's own
# default is smaller (fgsm takes one step).
_ATTACK_STEPS = 20
# Arguments the sweep sets itself and so may not appear among a method's hyper-parameters.
_RESERVED_FIT_ARGS = ("net", "model", "module", "data", "dataset", "seed", "device", "progress")
_SWEEP_KEYS = ("name", "datasets", "architectures", "methods", "train_sizes", "seeds", "evaluation")
_EVALUATION_DEFAULTS = {"budgets": [0.1], "points": 100, "ece_bins": 15, "target": "predicted"}
#: sample counts of the expected-gradient read-out when the sweep does not say; "all" is every member.
#: Left out of a run's configuration while it is the default, so run keys from before the read-out hold.
DEFAULT_GRADIENT_SAMPLES = (1, 4, 16, 64, "all")
#: certified accuracy per budget (jostle.certify) unless the evaluation says ``certify = false``;
#: like the gradient read-out, left out of a run's configuration while it is the default.
CERTIFY_DEFAULT = {"method": "crown", "norm": "inf"}
_CERTIFY_METHODS = ("crown", "ibp")
_CERTIFY_NORMS = ("inf", "2")


class SweepConfigError(ValueError):
    """A sweep or run definition with an unknown key or a bad value (the message names the key)."""


def canonical_json(value: Any) -> str:
    """Sorted keys, no spaces, ASCII: the same configuration always gives the same text."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)


def run_key(config: dict) -> str:
    """The stable identity of a run: sha256 (hex) of the canonical JSON of its configuration.

    A data file enters by its content: its paths are left out and its sha256 kept
    (:func:`jostle.sweeps.data_sources.without_paths`), so moving the file keeps the runs and
    changing it makes new ones. Configurations without files are hashed as they are.
    """
    if "data" in config and "format" in config["data"]:
        config = {**config, "data": without_paths(config["data"])}
    return hashlib.sha256(canonical_json(config).encode("ascii")).hexdigest()


def read_toml(path: str | Path) -> dict:
    """Parse a TOML file, turning a missing file or a syntax error into a one-line message."""
    path = Path(path)
    if not path.is_file():
        raise SweepConfigError(f"config file does not exist: {path}")
    try:
        return tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as err:
        raise SweepConfigError(f"{path} is not valid TOML: {err}") from None
    except UnicodeDecodeError:
        raise SweepConfigError(f"{path} is not a UTF-8 text file") from None


def check_sweep(spec: dict, where: str = "sweep", paths_from: str | Path | None = None) -> dict:
    """Check a sweep definition and return it normalised (defaults filled in).

    Relative file paths of data sets are read from ``paths_from`` (default: the working
    directory) and recorded as absolute paths.

    Raises
    ------
    SweepConfigError
        Naming the first unknown key or bad value, e.g. ``sweep.seeds[1]: ...``.
    """
    _known_keys(spec, _SWEEP_KEYS, where)
    for required in ("datasets", "methods"):
        if required not in spec:
            raise SweepConfigError(f"{where}: missing key {required!r}")
    name = spec.get("name", "sweep")
    if not isinstance(name, str) or not name:
        raise SweepConfigError(f"{where}.name: must be a non-empty string; got {name!r}")
    sizes = _int_list(spec.get("train_sizes", [200]), f"{where}.train_sizes", low=2)
    seeds = _int_list(spec.get("seeds", [0]), f"{where}.seeds", low=0)
    data = [_check_data(d, f"{where}.datasets[{i}]", size, paths_from)
            for i, d in enumerate(_list(spec["datasets"], f"{where}.datasets")) for size in sizes]
    archs = [_check_architecture(a, f"{where}.architectures[{i}]")
             for i, a in enumerate(_list(spec.get("architectures", [{}]), f"{where}.architectures"))]
    _check_builds(data, archs, [f"{where}.datasets[{i // len(sizes)}]" for i in range(len(data))],
                  [f"{where}.architectures[{i}]" for i in range(len(archs))])
    methods = [setting for i, m in enumerate(_list(spec["methods"], f"{where}.methods"))
               for setting in _check_method(m, f"{where}.methods[{i}]")]
    evaluation = check_evaluation(spec.get("evaluation", {}), f"{where}.evaluation")
    return {"name": name, "data": data, "architectures": archs, "methods": methods,
            "seeds": seeds, "evaluation": evaluation}


def expand(checked: dict) -> list[dict]:
    """Every run of a checked sweep, as configuration dicts, without duplicates, in grid order."""
    runs, seen = [], set()
    for data, arch, method, seed in itertools.product(
        checked["data"], checked["architectures"], checked["methods"], checked["seeds"]
    ):
        config = {"data": data, "architecture": arch, "method": method, "seed": seed,
                  "evaluation": checked["evaluation"]}
        key = run_key(config)
        if key not in seen:
            seen.add(key)
            runs.append(config)
    return runs


def check_run(spec: dict, where: str = "run", need_evaluation: bool = True,
              paths_from: str | Path | None = None) -> dict:
    """Check one run's fields (``data``, ``architecture``, ``method``, ``seed``, ``evaluation``);
    ``paths_from`` as in :func:`check_sweep`."""
    _known_keys(spec, ("data", "architecture", "method", "seed", "evaluation"), where)
    for required in ("data", "method"):
        if required not in spec:
            raise SweepConfigError(f"{where}: missing key {required!r}")
    data = dict(_table(spec["data"], f"{where}.data"))
    size = data.pop("n_train", 200)
    settings = _check_method(spec["method"], f"{where}.method")
    if len(settings) != 1:
        raise SweepConfigError(f"{where}.method: a single run takes one setting; remove 'grid'")
    config = {
        "data": _check_data(data, f"{where}.data", _int(size, f"{where}.data.n_train", low=2), paths_from),
        "architecture": _check_architecture(spec.get("architecture", {}), f"{where}.architecture"),
        "method": settings[0],
        "seed": _int(spec.get("seed", 0), f"{where}.seed", low=0),
    }
    _check_builds([config["data"]], [config["architecture"]], [f"{where}.data"], [f"{where}.architecture"])
    if need_evaluation or "evaluation" in spec:
        config["evaluation"] = check_evaluation(spec.get("evaluation", {}), f"{where}.evaluation")
    return config


def check_evaluation(spec: Any, where: str) -> dict:
    """Budgets, attacks and scoring options shared by every run of a sweep."""
    spec = _table(spec, where)
    _known_keys(spec, ("budgets", "attacks", "points", "ece_bins", "target", "gradient_samples", "certify"), where)
    budgets = _list(spec.get("budgets", _EVALUATION_DEFAULTS["budgets"]), f"{where}.budgets")
    budgets = [_float(b, f"{where}.budgets[{i}]", low=0.0) for i, b in enumerate(budgets)]
    attacks = _list(spec.get("attacks", [{"method": "fgsm"}, {"method": "pgd"}]), f"{where}.attacks")
    attacks = [_check_attack(a, f"{where}.attacks[{i}]") for i, a in enumerate(attacks)]
    labels = [a["label"] for a in attacks]
    for i, label in enumerate(labels):
        if labels.index(label) != i:
            raise SweepConfigError(f"{where}.attacks[{i}]: label {label!r} repeats attacks[{labels.index(label)}]")
    target = spec.get("target", _EVALUATION_DEFAULTS["target"])
    if target not in _TARGETS:
        raise SweepConfigError(f"{where}.target: must be one of {_listing(_TARGETS)}; got {target!r}")
    checked = {
        "budgets": budgets,
        "attacks": attacks,
        "points": _int(spec.get("points", _EVALUATION_DEFAULTS["points"]), f"{where}.points", low=1),
        "ece_bins": _int(spec.get("ece_bins", _EVALUATION_DEFAULTS["ece_bins"]), f"{where}.ece_bins", low=1),
        "target": target,
    }
    certificate = _check_certify(spec.get("certify", CERTIFY_DEFAULT), f"{where}.certify")
    if certificate != CERTIFY_DEFAULT:
        checked["certify"] = certificate if certificate is not None else False
    if "gradient_samples" in spec:
        samples = _check_gradient_samples(spec["gradient_samples"], f"{where}.gradient_samples")
        if samples != list(DEFAULT_GRADIENT_SAMPLES):
            checked["gradient_samples"] = samples
    return checked


def gradient_sample_counts(evaluation: dict, members: int) -> list[int]:
    """The read-out's sample counts for a posterior of ``members`` members: each of the
    evaluation's ``gradient_samples`` ("all" is ``members``) clipped to ``members``, without
    repeats, ascending.

    >>> gradient_sample_counts({}, 10)
    [1, 4, 10]
    """
    wanted = evaluation.get("gradient_samples", DEFAULT_GRADIENT_SAMPLES)
    return sorted({members if s == "all" else min(int(s), members) for s in wanted})


def fit_function(method: str):
    """The jostle function that fits posterior method ``method`` (a key of :data:`FITS`)."""
    return FITS[method]


# ---------------------------------------------------------------------- private helpers
def _check_data(spec: Any, where: str, n_train: int, paths_from: str | Path | None) -> dict:
    """A built-in name (a string, or a table with ``name``) or a file table with ``format``."""
    if isinstance(spec, str):
        spec = {"name": spec}
    spec = dict(_table(spec, where))
    if "format" in spec:
        return _check_file_data(spec, where, n_train, paths_from)
    name = spec.pop("name", None)
    if name not in DATASETS:
        raise SweepConfigError(f"{where}.name: unknown data set {name!r} (known: {_listing(DATASETS)}; "
                               f"or a file: format = {_listing(FILE_FORMATS)})")
    parameters = inspect.signature(builtin_loader(name)).parameters
    allowed = [p for p in parameters if p != "n_train"]
    if "n_train" in spec:
        raise SweepConfigError(f"{where}.n_train: set training sizes with sweep.train_sizes")
    _known_keys(spec, allowed, where)
    args = {p: spec.get(p, parameters[p].default) for p in allowed}
    return _check_loads({"name": name, "n_train": n_train, **args}, where)


def _check_file_data(spec: dict, where: str, n_train: int, paths_from: str | Path | None) -> dict:
    """``{"format": ..., <path arguments>, **loader args}`` -> absolute paths, their sha256, the
    loader's defaults filled in."""
    fmt = spec.pop("format")
    if fmt not in (*FILE_FORMATS, TORCH_FORMAT):
        raise SweepConfigError(f"{where}.format: unknown file format {_brief(fmt)} "
                               f"(known: {_listing((*FILE_FORMATS, TORCH_FORMAT))})")
    if "n_train" in spec:
        raise SweepConfigError(f"{where}.n_train: set training sizes with sweep.train_sizes")
    if "sha256" in spec:
        raise SweepConfigError(f"{where}.sha256: computed from the data themselves; remove it")
    if fmt == TORCH_FORMAT:
        return _check_torch_data(spec, where, n_train)
    parameters = inspect.signature(file_loader(fmt)).parameters
    _known_keys(spec, list(parameters), where)
    paths = PATH_ARGUMENTS[fmt]
    entry: dict[str, Any] = {"format": fmt}
    digests = {}
    base = Path.cwd() if paths_from is None else Path(paths_from)
    for argument in paths:
        value = spec.get(argument, parameters[argument].default)
        if value is inspect.Parameter.empty:
            raise SweepConfigError(f"{where}: missing key {argument!r} (the {fmt} file to read)")
        if value is None:
            entry[argument] = None
            continue
        if isinstance(value, os.PathLike):  # a pathlib.Path from Python
            value = os.fspath(value)
        if not isinstance(value, str) or not value:
            raise SweepConfigError(f"{where}.{argument}: must be a path (a non-empty string); got {_brief(value)}")
        path = (base / Path(value).expanduser()).resolve()
        folder = fmt == "folder"
        if not (path.is_dir() if folder else path.is_file()):
            kind = "folder" if folder else "file"
            found = "" if not path.exists() else f" (it is a {'file' if path.is_file() else 'folder'})"
            raise SweepConfigError(f"{where}.{argument}: no such {kind} {str(path)!r}{found}")
        entry[argument] = str(path)
        try:
            digests[argument] = content_sha256(path)
        except OSError as err:
            raise SweepConfigError(f"{where}.{argument}: cannot read {str(path)!r} ({err})") from None
    for argument, parameter in parameters.items():
        if argument in paths:
            continue
        value = spec.get(argument, parameter.default)
        if isinstance(value, tuple):
            value = list(value)
        entry[argument] = value if value is None else _check_plain(value, f"{where}.{argument}")
    entry["sha256"] = digests
    entry["n_train"] = n_train
    return _check_loads(entry, where)


def _check_torch_data(spec: dict, where: str, n_train: int) -> dict:
    """``{"format": "torch", "datasets": "module:function", "arguments": {...}, "classes": [...]}``
    -> the function's pair copied once, its arrays' sha256 recorded."""
    _known_keys(spec, ("datasets", "arguments", "classes"), where)
    if "datasets" not in spec:
        raise SweepConfigError(f"{where}: missing key 'datasets' (a 'module:function' returning the "
                               f"train and test torch datasets)")
    try:
        resolve_callable(spec["datasets"])
    except ValueError as err:
        raise SweepConfigError(f"{where}.datasets: {err}") from None
    arguments = _table(spec.get("arguments", {}), f"{where}.arguments")
    arguments = {k: _check_plain(v, f"{where}.arguments.{k}") for k, v in arguments.items()}
    classes = spec.get("classes")
    entry = {"format": TORCH_FORMAT, "datasets": spec["datasets"], "arguments": arguments,
             "classes": None if classes is None else _check_plain(classes, f"{where}.classes"), "n_train": n_train}
    try:
        made = load_source(source_of(entry))
    except (ValueError, TypeError) as err:
        raise SweepConfigError(f"{where}: {err}") from None
    entry["sha256"] = {"arrays": arrays_sha256(made)}
    return _check_loads(entry, where)


def _check_loads(entry: dict, where: str) -> dict:
    """Load the entry's source once (kept loaded for the sweep) and check the training size."""
    try:
        loaded = load_source(source_of(entry))
    except FileNotFoundError as err:
        raise SweepConfigError(f"{where}: {err}") from None
    except (ValueError, TypeError) as err:
        raise SweepConfigError(f"{where}: {err}") from None
    available = int(loaded.x_train.shape[0])
    if source_of(entry) != entry and entry["n_train"] > available:
        raise SweepConfigError(f"{where}: training size must be <= {available} (the training points of "
                               f"{data_label(entry)}); got {entry['n_train']}")
    return entry


def _check_architecture(spec: Any, where: str) -> dict:
    """The depth-width MLP table, ``{"builder": name, ...}``, or ``"module:function"`` /
    ``{"callable": "module:function", ...}``."""
    if isinstance(spec, str):
        spec = {"callable": spec}
    spec = _table(spec, where)
    if "builder" in spec or "callable" in spec:
        return _check_factory(dict(spec), where)
    _known_keys(spec, ("depth", "width", "activation"), where)
    activation = spec.get("activation", "tanh")
    if activation not in ACTIVATIONS:
        raise SweepConfigError(
            f"{where}.activation: unknown activation {activation!r} (known: {_listing(ACTIVATIONS)})"
        )
    return {
        "depth": _int(spec.get("depth", 2), f"{where}.depth", low=0),
        "width": _int(spec.get("width", 32), f"{where}.width", low=1),
        "activation": activation,
    }


def _check_factory(spec: dict, where: str) -> dict:
    """A builder or callable entry: the function found, its arguments named in its signature,
    plain values; a builder's defaults filled in (a callable keeps what it was given)."""
    if "builder" in spec and "callable" in spec:
        raise SweepConfigError(f"{where}: give either 'builder' or 'callable', not both")
    kind = "builder" if "builder" in spec else "callable"
    try:
        factory = factory_of(spec)
    except ValueError as err:
        raise SweepConfigError(f"{where}.{kind}: {err}") from None
    try:
        parameters = inspect.signature(factory).parameters
    except (TypeError, ValueError):
        raise SweepConfigError(f"{where}.{kind}: {spec[kind]!r} has no readable signature") from None
    takes_any = any(p.kind is inspect.Parameter.VAR_KEYWORD for p in parameters.values())
    named = [p for p, v in parameters.items()
             if v.kind in (inspect.Parameter.POSITIONAL_OR_KEYWORD, inspect.Parameter.KEYWORD_ONLY)]
    entry = {kind: spec.pop(kind)}
    for key, value in spec.items():
        if key in DATA_ARGUMENTS:
            raise SweepConfigError(f"{where}.{key}: set by the sweep from the data set")
        if key not in named and not takes_any:
            allowed = [p for p in named if p not in DATA_ARGUMENTS]
            raise SweepConfigError(f"{where}: unknown key {key!r} of {entry[kind]!r} (allowed: {_listing(allowed)})")
        entry[key] = value if value is None else _check_plain(value, f"{where}.{key}")
    if kind == "builder":
        for key in named:
            default = parameters[key].default
            if key not in entry and key not in DATA_ARGUMENTS and default is not inspect.Parameter.empty:
                entry[key] = list(default) if isinstance(default, tuple) else default
    missing = [p for p in named if p not in entry and p not in DATA_ARGUMENTS
               and parameters[p].default is inspect.Parameter.empty]
    if missing:
        raise SweepConfigError(f"{where}: missing key {missing[0]!r} (an argument of {entry[kind]!r} "
                               f"without a default)")
    return entry


def _check_builds(data: list[dict], archs: list[dict], data_where: list[str], arch_where: list[str]) -> None:
    """Build each builder or callable architecture once for each data source it meets, so a
    refused argument, images asked of feature vectors, or a result that is no ``nn.Module`` is
    caught now, not in every run."""
    tried = set()
    for arch, arch_at in zip(archs, arch_where):
        if "builder" not in arch and "callable" not in arch:
            continue
        for entry, data_at in zip(data, data_where):
            token = canonical_json([source_of(entry), arch])
            if token in tried:
                continue
            tried.add(token)
            try:
                build_network(arch, load_source(source_of(entry)))
            except ValueError as err:
                raise SweepConfigError(f"{arch_at} on {data_at}: {err}") from None


def _check_method(spec: Any, where: str) -> list[dict]:
    """One method entry -> its settings (several when it holds a ``grid`` table)."""
    if isinstance(spec, str):
        spec = {"name": spec}
    spec = dict(_table(spec, where))
    if "name" not in spec:
        raise SweepConfigError(f"{where}: a method table needs the key 'name' (one of {_listing(METHODS)}); "
                               f"got the keys {', '.join(repr(k) for k in spec) or 'none'}")
    name = spec.pop("name")
    if name not in METHODS:
        raise SweepConfigError(f"{where}: unknown method {name!r} (known: {_listing(METHODS)})")
    grid = _table(spec.pop("grid", {}), f"{where}.grid")
    for key in grid:
        if key in spec:
            raise SweepConfigError(f"{where}.grid.{key}: also set as a fixed hyper-parameter")
    for key, value in {**spec, **{k: None for k in grid}}.items():
        _check_hyperparameter_name(name, key, where)
        if key in spec:
            _check_plain(value, f"{where}.{key}")
    axes = [[(key, _check_plain(v, f"{where}.grid.{key}[{i}]"))
             for i, v in enumerate(_list(values, f"{where}.grid.{key}"))]
            for key, values in sorted(grid.items())]
    return [{"name": name, **spec, **dict(choice)} for choice in itertools.product(*axes)]


def _check_hyperparameter_name(method: str, key: str, where: str) -> None:
    if key in _RESERVED_FIT_ARGS:
        raise SweepConfigError(f"{where}.{key}: set by the sweep itself, not a hyper-parameter")
    fit = fit_function(method)
    # Each fit declares its options (jostle.fitting.training_options.training_fit): its own,
    # then the shared training options it takes.
    allowed = [p for p in (*fit.method_options, *fit.training_options) if p not in _RESERVED_FIT_ARGS]
    if key not in allowed:
        raise SweepConfigError(
            f"{where}.{key}: unknown hyper-parameter of {METHODS[method]} (known: {_listing(allowed)})"
        )


def _check_attack(spec: Any, where: str) -> dict:
    """One attack entry; method, norm and objective from the attack registry (norm and
    objective default to the method's own)."""
    if isinstance(spec, str):
        spec = {"method": spec}
    spec = _table(spec, where)
    _known_keys(spec, ("method", "norm", "steps", "samples", "objective", "label"), where)
    method = spec.get("method")
    if not isinstance(method, str) or method not in attack_names():
        raise SweepConfigError(f"{where}.method: unknown attack {method!r} (known: {_listing(attack_names())})")
    norm = spec.get("norm")
    norm = str(norm) if isinstance(norm, int) and not isinstance(norm, bool) else norm  # TOML: norm = 2
    try:
        _, norm, _ = resolve_settings(method, norm, None)
    except ValueError as err:
        raise SweepConfigError(f"{where}.norm: {err}") from None
    try:
        _, _, objective = resolve_settings(method, norm, spec.get("objective"))
    except ValueError as err:
        raise SweepConfigError(f"{where}.objective: {err}") from None
    steps = _int(spec.get("steps", _default_steps(method)), f"{where}.steps", low=1)
    samples = spec.get("samples")
    samples = None if samples is None else _int(samples, f"{where}.samples", low=1)
    label = spec.get("label") or f"{method}-{norm}" + (f"-s{samples}" if samples else "")
    if not isinstance(label, str):
        raise SweepConfigError(f"{where}.label: must be a string; got {label!r}")
    return {"method": method, "norm": norm, "steps": steps, "samples": samples,
            "objective": objective, "label": label}


def _check_gradient_samples(value: Any, where: str) -> list:
    """Positive integers or "all", without repeats, kept in the order given."""
    out: list = []
    for i, s in enumerate(_list(value, where)):
        if s != "all" and (isinstance(s, bool) or not isinstance(s, int) or s < 1):
            raise SweepConfigError(f"{where}[{i}]: must be an integer >= 1 or 'all'; got {_brief(s)}")
        if s in out:
            raise SweepConfigError(f"{where}[{i}]: {s!r} repeats an earlier entry")
        out.append(s)
    return out


def _check_certify(spec: Any, where: str) -> dict | None:
    """``{method, norm}`` of the certificate scored per budget, or None (``false`` / ``"off"``)."""
    if spec is False or spec is None or spec == "off":
        return None
    spec = _table(spec, where)
    _known_keys(spec, ("method", "norm"), where)
    method = spec.get("method", CERTIFY_DEFAULT["method"])
    if method not in _CERTIFY_METHODS:
        raise SweepConfigError(f"{where}.method: must be one of {_listing(_CERTIFY_METHODS)}; got {_brief(method)}")
    norm = spec.get("norm", CERTIFY_DEFAULT["norm"])
    norm = str(norm) if isinstance(norm, int) and not isinstance(norm, bool) else norm  # TOML: norm = 2
    if norm not in _CERTIFY_NORMS:
        raise SweepConfigError(f"{where}.norm: must be one of {_listing(_CERTIFY_NORMS)}; got {_brief(norm)}")
    return {"method": method, "norm": norm}


def _default_steps(method: str) -> int:
    own = inspect.signature(attack_spec(method).function).parameters.get("steps")
    if own is None or not isinstance(own.default, int):
        return _ATTACK_STEPS
    return min(_ATTACK_STEPS, own.default)


def _known_keys(spec: dict, allowed, where: str) -> None:
    for key in spec:
        if key not in allowed:
            raise SweepConfigError(f"{where}: unknown key {key!r} (allowed: {_listing(allowed)})")


def _table(value: Any, where: str) -> dict:
    if not isinstance(value, dict):
        raise SweepConfigError(f"{where}: must be a table of keys; got {_brief(value)}")
    return value


def _list(value: Any, where: str) -> list:
    if isinstance(value, (str, bytes, dict)) or not isinstance(value, (list, tuple)):
        raise SweepConfigError(f"{where}: must be a list; got {_brief(value)}")
    if not value:
        raise SweepConfigError(f"{where}: must not be empty")
    return list(value)


def _int(value: Any, where: str, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        raise SweepConfigError(f"{where}: must be an integer >= {low}; got {_brief(value)}")
    return int(value)


def _int_list(value: Any, where: str, low: int) -> list[int]:
    return [_int(v, f"{where}[{i}]", low) for i, v in enumerate(_list(value, where))]


def _float(value: Any, where: str, low: float) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value < low:
        raise SweepConfigError(f"{where}: must be a finite number >= {low:g}; got {_brief(value)}")
    return float(value)


def _check_plain(value: Any, where: str) -> Any:
    """Hyper-parameter values must survive JSON unchanged (numbers, strings, booleans, lists)."""
    if isinstance(value, float) and not math.isfinite(value):
        raise SweepConfigError(f"{where}: must be finite; got {value!r}")
    if isinstance(value, (list, tuple)):
        return [_check_plain(v, f"{where}[{i}]") for i, v in enumerate(value)]
    if value is None or not isinstance(value, (bool, int, float, str)):
        raise SweepConfigError(f"{where}: must be a number, string, boolean or list; got {_brief(value)}")
    return value


def _listing(names) -> str:
    return ", ".join(repr(n) for n in names)


def _brief(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."
