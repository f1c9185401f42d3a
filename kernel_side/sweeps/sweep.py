"""Robustness-against-accuracy sweeps: define a grid of runs, execute it, keep the results.

Runs execute in the calling process by default. Given a ``dask.distributed.Client`` each
run becomes its own task on the cluster; workers only need ``import jostle`` (and, for an
architecture given as ``module:function``, that module). Each data set is loaded once in the
calling process and sent to every worker once (``client.scatter(..., broadcast=True)``); the
runs' tasks take it as an argument, so neither the data nor the files travel per run. Either way
the calling process is the only writer of the store: it commits each run as it
completes. Runs already stored are skipped, so rerunning a sweep after a crash or Ctrl-C
executes only what is missing; failed runs are retried unless ``retry_failed=False``.
"""
from __future__ import annotations

import traceback
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from jostle.common.progress import progress_bar as progress_bar_for
from jostle.sweeps.data_sources import load_source, source_of
from jostle.sweeps.one_run import execute_run, software_versions
from jostle.sweeps.results_db import RunStore
from jostle.sweeps.spec import SweepConfigError, canonical_json, check_sweep, expand, read_toml, run_key

__all__ = ["Sweep", "SweepSummary"]


@dataclass
class SweepSummary:
    """What one call of :meth:`Sweep.run` did.

    ``total`` runs in the sweep; ``skipped`` were already stored; ``finished`` and
    ``failed`` count the runs executed now; ``failed_keys`` lists the failures.
    """

    total: int
    skipped: int
    finished: int = 0
    failed: int = 0
    failed_keys: list[str] = field(default_factory=list)

    @property
    def remaining(self) -> int:
        return self.total - self.skipped - self.finished - self.failed


class Sweep:
    """A grid of runs comparing posterior methods on accuracy and robustness.

    Parameters
    ----------
    datasets : list of str or dict
        Each a built-in set, ``"moons"`` or ``{"name": "moons" | "circles" | "spirals" |
        "digits" | "leak_alarm" | "meter_cards", **loader args}`` (e.g. ``noise``, ``n_test``,
        ``seed``; ``meter_cards`` takes ``resolution`` and ``colour``), or a file read by a
        jostle loader, ``{"format": "npz", "path": ..., **from_npz args}``, ``{"format": "idx",
        "images_path": ..., "labels_path": ..., "test_images": ..., "test_labels": ...,
        **from_idx args}``, ``{"format": "folder", "path": ..., "size": [H, W], ...}``, or
        ``{"format": "torch", "datasets": "package.module:function", "arguments": {...}}`` whose
        function returns a (train, test) pair of torch datasets for ``from_torch``. The
        training size comes from ``train_sizes`` (``digits``, ``meter_cards`` and files keep
        their first N training points). Relative paths are read from ``paths_from``; each
        file's sha256 joins the run key in place of its path (a torch pair: its arrays' sha256),
        so changed data give new runs.
    methods : list of str or dict
        Each a method name (``map``, ``deep_ensemble``, ``dropout``, ``vi``, ``laplace``,
        ``hmc``) or ``{"name": ..., **hyper-parameters, "grid": {hyper-parameter: [values]}}``.
    architectures : list of str or dict
        Each ``{"depth": int, "width": int, "activation": str}`` (an MLP; default depth 2,
        width 32, tanh); ``{"builder": "mlp" | "cnn", **arguments}`` (e.g. ``{"builder": "cnn",
        "channels": [8, 16]}``); or your own function, ``"package.module:function"`` or
        ``{"callable": "package.module:function", **arguments}``, returning a ``torch.nn.Module``.
        Builders and functions get the table's arguments by keyword, plus ``in_features``,
        ``in_shape`` (``[C, H, W]``, image data only) and ``classes`` from the data set where
        their signature names them (see :mod:`jostle.sweeps.networks`).
    train_sizes : list of int
        Training-set sizes (default ``[200]``).
    seeds : list of int
        Seeds of the fits and attacks (default ``[0]``).
    evaluation : dict
        ``budgets`` (list of eps), ``attacks`` (list of ``{"method", "norm", "steps",
        "samples", "objective", "label"}``; default FGSM and PGD, L-inf), ``points``
        (test points attacked, default 100), ``ece_bins`` (15), ``target``
        (``"predicted"``: success means the prediction flipped; ``"true"``: the attacked
        point is misclassified), ``gradient_samples`` (the sample counts S of the
        expected-gradient read-out on the same points, integers or ``"all"``, default
        ``[1, 4, 16, 64, "all"]``, each clipped to the posterior's size).
    name : str
        Recorded with every run in the store.
    store : str or Path, optional
        Default store for :meth:`run` and :meth:`results`.
    paths_from : str or Path, optional
        Folder that relative data-file paths are read from (default: the working directory;
        :meth:`from_toml`: the TOML file's folder).

    Examples
    --------
    >>> sweep = Sweep(datasets=[{"name": "moons"}], methods=["map", "vi"], seeds=[0, 1])
    >>> len(sweep.runs())
    4
    """

    def __init__(self, datasets: list, methods: list, architectures: list | None = None,
                 train_sizes: list | None = None, seeds: list | None = None,
                 evaluation: dict | None = None, name: str = "sweep", store: str | Path | None = None,
                 paths_from: str | Path | None = None):
        spec: dict[str, Any] = {"name": name, "datasets": datasets, "methods": methods}
        for key, value in (("architectures", architectures), ("train_sizes", train_sizes),
                           ("seeds", seeds), ("evaluation", evaluation)):
            if value is not None:
                spec[key] = value
        self._checked = check_sweep(spec, paths_from=paths_from)
        self.name = self._checked["name"]
        self.store = None if store is None else Path(store)

    @classmethod
    def from_toml(cls, path: str | Path, store: str | Path | None = None) -> Sweep:
        """Read a sweep from a TOML file whose ``[sweep]`` table holds the same fields (relative
        data-file paths are read from the TOML file's folder)."""
        document = read_toml(path)
        unknown = [k for k in document if k != "sweep"]
        if unknown:
            raise SweepConfigError(f"unknown key {unknown[0]!r} at the top of {path} (allowed: 'sweep')")
        if "sweep" not in document:
            raise SweepConfigError(f"{path} has no [sweep] table")
        spec = dict(document["sweep"])
        return cls(**_keyword_form(spec), store=store, paths_from=Path(path).resolve().parent)

    def runs(self) -> list[dict]:
        """Every run's configuration dict, in grid order."""
        return expand(self._checked)

    def keys(self) -> list[str]:
        return [run_key(config) for config in self.runs()]

    def run(self, store: str | Path | None = None, client: Any = None, save_ensembles: bool = False,
            retry_failed: bool = True, progress: Callable[[dict, SweepSummary], None] | None = None,
            progress_bar: bool = True) -> SweepSummary:
        """Execute the runs not yet stored and commit each one as it completes.

        Parameters
        ----------
        store : str or Path, optional
            The SQLite file (defaults to the ``store`` given at construction).
        client : dask.distributed.Client, optional
            Send each run to this cluster as its own task; None runs them here, one by one.
        save_ensembles : bool
            Save each fitted ensemble as ``<store>.ensembles/<key>.safetensors``. Stored
            runs without a saved ensemble then run again to save one (runs are seeded, so
            they reproduce their stored results).
        retry_failed : bool
            Run again the runs stored as failed (default); False leaves them as they are.
        progress : callable, optional
            Called as ``progress(record, summary)`` after each run is committed.
        progress_bar : bool
            Show a tqdm bar counting finished, failed and remaining runs.

        Returns
        -------
        SweepSummary
        """
        path = self._store_path(store)
        configs = self.runs()
        with RunStore(path) as db:
            stored = db.statuses(run_key(c) for c in configs)

            def wanted(key: str) -> bool:
                if key not in stored:
                    return True
                if stored[key] == "failed":
                    return retry_failed
                # asked to save ensembles: a stored run without one runs again (it is seeded)
                saved = db.ensemble_file(key) if save_ensembles else None
                return save_ensembles and (saved is None or not saved.exists())

            pending = [c for c in configs if wanted(run_key(c))]
            summary = SweepSummary(total=len(configs), skipped=len(configs) - len(pending))
            with progress_bar_for(bool(progress_bar), len(pending), self.name, unit="run", leave=True) as bar:
                def commit(record: dict) -> None:
                    record.pop("_future_key", None)
                    db.record(record, sweep=self.name)
                    if record["status"] == "ok":
                        summary.finished += 1
                    else:
                        summary.failed += 1
                        summary.failed_keys.append(record["key"])
                    bar.set_postfix(finished=summary.finished, failed=summary.failed,
                                    remaining=summary.remaining, refresh=False)
                    bar.update(1)
                    if progress is not None:
                        progress(record, summary)

                if client is None:
                    for config in pending:
                        commit(execute_run(config, save_ensembles))
                else:
                    _run_on_cluster(client, pending, save_ensembles, commit)
        return summary

    def results(self, store: str | Path | None = None, wide: bool = False, include_failed: bool = False):
        """This sweep's stored results as a pandas DataFrame (see :meth:`RunStore.results`).

        Long form by default: one row per run x attack x budget; ``wide=True`` gives one
        row per run with a ``success_rate[...]`` and ``robustness[...]`` column per
        attack and budget and a ``grad_<statistic>[<which>@<S>]`` column per read-out value.
        """
        with RunStore(self._store_path(store), readonly=True) as db:
            return db.results(self.keys(), wide=wide, include_failed=include_failed)

    def gradients(self, store: str | Path | None = None):
        """This sweep's expected-gradient read-out as a long DataFrame (see :meth:`RunStore.gradients`):
        one row per run x sample count x ``which`` (``"expected"`` or ``"member"``)."""
        with RunStore(self._store_path(store), readonly=True) as db:
            return db.gradients(self.keys())

    def certified(self, store: str | Path | None = None):
        """This sweep's certified accuracy per run and budget (see :meth:`RunStore.certified`)."""
        with RunStore(self._store_path(store), readonly=True) as db:
            return db.certified(self.keys())

    def __len__(self) -> int:
        return len(self.runs())

    def __repr__(self) -> str:
        methods = sorted({m["name"] for m in self._checked["methods"]})
        return f"Sweep(name={self.name!r}, runs={len(self)}, methods={methods})"

    def _store_path(self, store: str | Path | None) -> Path:
        if store is None:
            store = self.store
        if store is None:
            raise ValueError("store must be a path to a SQLite file; got None (pass store= here or to Sweep)")
        self.store = Path(store)
        return self.store


def _keyword_form(spec: dict) -> dict:
    known = ("name", "datasets", "architectures", "methods", "train_sizes", "seeds", "evaluation")
    for key in spec:
        if key not in known:
            listed = ", ".join(repr(k) for k in known)
            raise SweepConfigError(f"sweep: unknown key {key!r} (allowed: {listed})")
    for required in ("datasets", "methods"):
        if required not in spec:
            raise SweepConfigError(f"sweep: missing key {required!r}")
    return spec


def _run_on_cluster(client: Any, pending: list[dict], save_ensembles: bool,
                    commit: Callable[[dict], None]) -> None:
    """Send each data source to every worker once, submit every run with its source's future,
    commit results in completion order; cancel the rest on any error."""
    from distributed import as_completed

    batch = uuid.uuid4().hex[:8]
    sources: dict[str, Any] = {}
    futures = {}
    try:
        for config in pending:
            token = canonical_json(source_of(config["data"]))
            if token not in sources:
                try:
                    sources[token] = client.scatter(load_source(source_of(config["data"])), broadcast=True,
                                                    hash=False)
                except (OSError, ValueError) as err:  # e.g. a file changed since the sweep was checked
                    sources[token] = err
            if isinstance(sources[token], BaseException):
                commit(_lost_record(config, sources[token]))
                continue
            key = run_key(config)
            future = client.submit(execute_run, config, save_ensembles, sources[token],
                                   key=f"jostle-run-{key[:16]}-{batch}", pure=False, retries=0)
            futures[future] = config
        for future in as_completed(list(futures)):
            config = futures[future]
            try:
                record = future.result()
            except Exception as err:  # e.g. KilledWorker after repeated worker deaths
                record = _lost_record(config, err)
            future.release()
            commit(record)
    except BaseException:
        client.cancel(list(futures))
        raise
    finally:
        for source in sources.values():
            if not isinstance(source, BaseException):
                source.release()


def _lost_record(config: dict, err: BaseException) -> dict:
    return {
        "key": run_key(config), "config": config, "status": "failed", "metrics": None,
        "error": f"{type(err).__name__}: {err}".splitlines()[0][:500],
        "traceback": "".join(traceback.format_exception(type(err), err, err.__traceback__)),
        "versions": software_versions(), "worker": None,
    }
