"""The training options every gradient-trained fit shares, checked and documented once.

``fit_map``, ``fit_deep_ensemble``, ``fit_dropout``, ``fit_vi`` and ``fit_laplace`` take
the same keywords (``epochs``, ``batch_size``, ``lr``, ``validation``, ``patience``,
``seed``, ``progress``, ``device``; all but ``fit_vi`` also ``weight_decay``,
``optimizer``, ``momentum``). :class:`TrainingOptions` holds them with their defaults and
checks; :func:`training_fit` marks a fit as taking them: it checks the fit's signature
against the defaults here, writes the shared docstring section into the fit's
``{training_options}`` placeholder, and records ``fit.training_options`` (the shared
keywords it takes) and ``fit.method_options`` (its own), which the sweep reads.
"""
from __future__ import annotations

import inspect
import textwrap
from collections.abc import Callable
from dataclasses import asdict, dataclass, fields, replace
from typing import Any, TypeVar

import torch

from jostle.common.checks import check_choice, check_float, check_int, check_seed, show_value

__all__ = ["TrainingOptions", "TRAINING_OPTIONS", "OPTIMISER_OPTIONS", "OPTIMIZERS", "training_fit",
           "check_device", "check_module_and_data"]

OPTIMIZERS = ("adam", "sgd")
Fit = TypeVar("Fit", bound=Callable[..., Any])


@dataclass(frozen=True)
class TrainingOptions:
    """The shared training keywords of the ``fit_*`` functions, with their defaults.

    Build one from a fit's keywords and call :meth:`checked`; the fields are documented in
    :data:`OPTION_DOCS` (the text every fit's docstring shows).

    Examples
    --------
    >>> TrainingOptions(epochs=30, seed=0, progress=False).checked().epochs
    30
    """

    epochs: int = 100
    batch_size: int = 32
    lr: float = 1e-2
    weight_decay: float = 1e-4
    optimizer: str = "adam"
    momentum: float = 0.9
    validation: float = 0.0
    patience: int = 10
    seed: int = 0
    progress: bool = True
    device: Any = None

    def checked(self) -> TrainingOptions:
        """The same options with every value checked (``device`` a ``torch.device``).

        Raises
        ------
        ValueError
            Naming the first bad option, its rule and its value.
        """
        return replace(
            self,
            epochs=check_int("epochs", self.epochs, low=1),
            batch_size=check_int("batch_size", self.batch_size, low=1),
            lr=check_float("lr", self.lr, low=0.0, low_open=True),
            weight_decay=check_float("weight_decay", self.weight_decay, low=0.0),
            optimizer=check_choice("optimizer", self.optimizer, OPTIMIZERS),
            momentum=check_float("momentum", self.momentum, low=0.0, high=1.0, high_open=True),
            validation=check_float("validation", self.validation, low=0.0, high=1.0, high_open=True),
            patience=check_int("patience", self.patience, low=1),
            seed=check_seed(self.seed),
            progress=bool(self.progress),
            device=check_device(self.device),
        )

    def as_meta(self) -> dict:
        """The optimisation settings a fitted posterior records in ``meta`` (not seed,
        progress or device, which ``meta`` keeps elsewhere or not at all)."""
        values = asdict(self)
        for name in ("seed", "progress", "device"):
            del values[name]
        return values

    def keywords(self) -> dict:
        """Every option as keyword arguments (to pass on to another fit)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


#: every shared training keyword, in signature order
TRAINING_OPTIONS = tuple(f.name for f in fields(TrainingOptions))
#: the optimiser's keywords; fit_vi takes none of them (Adam, the KL is its regulariser)
OPTIMISER_OPTIONS = ("weight_decay", "optimizer", "momentum")

OPTION_DOCS = {
    "epochs": "epochs : int\n    Passes over the training points.",
    "batch_size": "batch_size : int\n    Minibatch size.",
    "lr": "lr : float\n    Learning rate (> 0).",
    "weight_decay": (
        "weight_decay : float\n    L2 penalty coefficient (a Gaussian prior on the weights, in the MAP reading)."
    ),
    "optimizer": 'optimizer : {"adam", "sgd"}',
    "momentum": "momentum : float in [0, 1)\n    SGD momentum (ignored by Adam).",
    "validation": (
        "validation : float in [0, 1)\n    Share of the training points held out for early stopping (0 trains "
        "on all for\n    ``epochs`` epochs). The parameters of the best validation epoch are kept."),
    "patience": "patience : int\n    Epochs without a validation gain before stopping.",
    "seed": ("seed : int\n    Seeds every random draw of the fit: the initialisation, the minibatch order, "
             "the\n    validation split and the method's own noise, each from its own stream."),
    "progress": "progress : bool\n    Show a tqdm progress bar with the loss.",
    "device": "device : str or torch.device, optional\n    Where to train (default CPU).",
}


def training_fit(options: tuple[str, ...] = TRAINING_OPTIONS) -> Callable[[Fit], Fit]:
    """Mark a fit as taking the shared training ``options`` as keywords.

    The fit's defaults for them must equal :class:`TrainingOptions`' (a TypeError at import
    otherwise, so the two cannot drift apart). A ``{training_options}`` line in its
    docstring is replaced by the options' documentation at that line's indentation.
    """
    unknown = [name for name in options if name not in TRAINING_OPTIONS]
    if unknown:
        raise ValueError(f"options must be names of TrainingOptions fields; got {unknown}")

    def mark(fit: Fit) -> Fit:
        parameters = inspect.signature(fit).parameters
        defaults = TrainingOptions()
        for name in options:
            given = parameters.get(name)
            if given is None or given.default != getattr(defaults, name):
                found = "missing" if given is None else f"default {given.default!r}"
                raise TypeError(f"{fit.__name__} must take {name}={getattr(defaults, name)!r} "
                                f"(TrainingOptions); {found}")
        fit.__doc__ = _fill_section(fit.__doc__ or "", options)
        fit.training_options = tuple(name for name in parameters if name in options)
        fit.method_options = tuple(name for name in list(parameters)[2:] if name not in options)
        return fit

    return mark


def check_module_and_data(module: Any, data: Any) -> None:
    """The sampling fits' first checks: a module with trainable parameters and a jostle Dataset."""
    if not isinstance(module, torch.nn.Module):
        raise ValueError(f"module must be a torch.nn.Module; got {show_value(module)}")
    if not all(hasattr(data, name) for name in ("x_train", "y_train", "x_test", "classes", "bounds")):
        raise ValueError(f"data must be a jostle.Dataset; got {show_value(data)}")
    if not any(p.requires_grad for p in module.parameters()):
        raise ValueError("module must have at least one parameter with requires_grad=True; got none")


def check_device(device: Any) -> torch.device:
    """A torch device to train on (None: the CPU); the 'meta' device is refused."""
    if device is None:
        return torch.device("cpu")
    try:
        device = torch.device(device)
    except (RuntimeError, TypeError):
        raise ValueError(f"device must name a torch device such as 'cpu' or 'cuda'; got {show_value(device)}") from None
    if device.type == "meta":
        raise ValueError("device must hold values to train on, such as 'cpu' or 'cuda'; got 'meta'")
    return device


def _fill_section(doc: str, options: tuple[str, ...]) -> str:
    lines = doc.split("\n")
    for k, line in enumerate(lines):
        if line.strip() == "{training_options}":
            indent = line[: len(line) - len(line.lstrip())]
            text = "\n".join(OPTION_DOCS[name] for name in options if name in OPTION_DOCS)
            lines[k] = textwrap.indent(text, indent)
    return "\n".join(lines)
