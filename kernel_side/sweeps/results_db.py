"""Sweep results in one SQLite file (WAL mode, one transaction per finished run).

Table ``runs`` holds one row per run key (UNIQUE): its full configuration as canonical
JSON, status (``ok`` / ``failed``), headline metrics, timings, software versions, the
error and traceback of a failed run, and the path of its saved ensemble if any. Table
``attack_results`` holds one row per run x attack x budget, and ``gradient_results`` one row
per run x sample count x ``which`` (``expected`` or ``member``) of the expected-gradient
read-out (schema version 2; a version-1 store opens with a warning that its runs carry no
gradient read-out, and one from a newer jostle is refused); table ``certified_results`` holds one
row per run x budget x certificate (norm and method). A failed run that is retried
replaces its row, so a key never appears twice. Only the process that runs the sweep
writes; readers may look at the file at any time (WAL lets them).
"""
from __future__ import annotations

import json
import sqlite3
import time
import warnings
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from jostle.files.posterior_file import atomic_write
from jostle.sweeps.data_sources import data_label
from jostle.sweeps.networks import architecture_label
from jostle.sweeps.one_run import GRADIENT_STATISTICS
from jostle.sweeps.spec import DETERMINISTIC_METHODS, canonical_json

__all__ = ["RunStore", "StoreError", "SCHEMA_VERSION", "OldStoreWarning"]

#: 2 added ``gradient_results`` (the expected-gradient read-out); 1 stores open without it
SCHEMA_VERSION = 2
_READABLE_VERSIONS = (1, 2)

_SCHEMA = """
CREATE TABLE IF NOT EXISTS store_info (name TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    key TEXT PRIMARY KEY NOT NULL,
    sweep TEXT,
    status TEXT NOT NULL CHECK (status IN ('ok', 'failed')),
    config TEXT NOT NULL,
    accuracy REAL, nll REAL, ece REAL, members INTEGER,
    metrics TEXT,
    error TEXT, traceback TEXT, warnings TEXT,
    fit_seconds REAL, eval_seconds REAL, started REAL, finished REAL, recorded REAL NOT NULL,
    worker TEXT, versions TEXT NOT NULL,
    ensemble_path TEXT,
    attempts INTEGER NOT NULL DEFAULT 1
);
CREATE TABLE IF NOT EXISTS attack_results (
    key TEXT NOT NULL REFERENCES runs (key) ON DELETE CASCADE,
    attack TEXT NOT NULL, budget REAL NOT NULL,
    method TEXT NOT NULL, norm TEXT NOT NULL, steps INTEGER, samples INTEGER,
    success_rate REAL, robustness REAL,
    PRIMARY KEY (key, attack, budget)
);
CREATE TABLE IF NOT EXISTS gradient_results (
    key TEXT NOT NULL REFERENCES runs (key) ON DELETE CASCADE,
    samples INTEGER NOT NULL, which TEXT NOT NULL CHECK (which IN ('expected', 'member')),
    l2_mean REAL, l2_median REAL, l2_p90 REAL, linf_mean REAL, linf_median REAL, linf_p90 REAL,
    abs_mean REAL,
    PRIMARY KEY (key, samples, which)
);
CREATE TABLE IF NOT EXISTS certified_results (
    key TEXT NOT NULL REFERENCES runs (key) ON DELETE CASCADE,
    budget REAL NOT NULL, norm TEXT NOT NULL, method TEXT NOT NULL,
    certified_accuracy REAL, members_certified REAL,
    PRIMARY KEY (key, budget, norm, method)
);
"""
_CONFIG_COLUMNS = ["dataset", "n_train", "depth", "width", "activation", "architecture", "method",
                   "method_settings", "family", "seed"]
_RUN_COLUMNS = ["key", "sweep", "status", "accuracy", "nll", "ece", "members", "fit_seconds",
                "eval_seconds", "worker", "ensemble_path", "attempts", "error", "warnings"]


class StoreError(RuntimeError):
    """A file that is not a jostle run store, or one written by a newer schema."""


class OldStoreWarning(UserWarning):
    """A store written before the gradient read-out (schema 1): its runs carry none."""


class RunStore:
    """Read and write one sweep store.

    Parameters
    ----------
    path : str or Path
        The SQLite file; created (with its folder) when missing.
    readonly : bool
        Open an existing file without the right to change it.

    Examples
    --------
    >>> with RunStore(":memory:") as store:
    ...     store.statuses([])
    {}
    """

    def __init__(self, path: str | Path, readonly: bool = False):
        self.path = Path(path) if str(path) != ":memory:" else None
        if readonly and (self.path is None or not self.path.is_file()):
            raise FileNotFoundError(f"store does not exist: {path}")
        if self.path is not None and not readonly:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        target = f"file:{self.path}?mode=ro" if readonly else str(path)
        try:
            self._db = sqlite3.connect(target, uri=readonly, isolation_level=None, timeout=30)
            self._db.execute("PRAGMA foreign_keys = ON")
            self.schema_version = self._read_version(str(path))
            if not readonly:
                self._db.execute("PRAGMA journal_mode = WAL")
                self._db.execute("PRAGMA synchronous = FULL")
                with _Transaction(self._db):  # readers see all of the schema or none of it
                    for statement in filter(str.strip, _SCHEMA.split(";")):
                        self._db.execute(statement)
                    # a version-1 store gains the new (empty) tables and becomes version 2
                    self._db.execute("INSERT OR REPLACE INTO store_info VALUES ('schema_version', ?)",
                                     (str(SCHEMA_VERSION),))
        except sqlite3.DatabaseError as err:
            raise StoreError(f"{path} is not a jostle run store: {err}") from None
        if self.schema_version == 1:
            warnings.warn(f"{path} is a version-1 jostle run store, written before the gradient read-out: "
                          "its runs carry no gradient read-out (gradients() has no rows for them); "
                          "run the sweep into a new store to record it", OldStoreWarning, stacklevel=2)

    # ------------------------------------------------------------------ writing
    def record(self, result: dict, sweep: str | None = None) -> None:
        """Commit one finished run (its row and its attack rows) in one transaction.

        ``result`` is a record from :func:`jostle.sweeps.one_run.execute_run`. If it carries
        ``ensemble_bytes`` they are first written atomically to
        ``<store>.ensembles/<key>.safetensors`` and the path (relative to the store's
        folder) is recorded. A row already stored under the key is replaced.
        """
        metrics = result.get("metrics") if result["status"] == "ok" else None
        ensemble_path = self._write_ensemble(result)
        row = {
            "key": result["key"], "sweep": sweep, "status": result["status"],
            "config": canonical_json(result["config"]),
            "accuracy": metrics and metrics["accuracy"], "nll": metrics and metrics["nll"],
            "ece": metrics and metrics["ece"], "members": metrics and metrics.get("members"),
            "metrics": None if metrics is None else json.dumps(metrics),
            "error": result.get("error"), "traceback": result.get("traceback"),
            "warnings": json.dumps(result.get("warnings") or []),
            "fit_seconds": result.get("fit_seconds"), "eval_seconds": result.get("eval_seconds"),
            "started": result.get("started"), "finished": result.get("finished"), "recorded": time.time(),
            "worker": result.get("worker"), "versions": json.dumps(result.get("versions") or {}),
            "ensemble_path": ensemble_path,
        }
        columns = ", ".join(row)
        marks = ", ".join(f":{c}" for c in row)
        updates = ", ".join(f"{c} = excluded.{c}" for c in row if c != "key")
        with self._transaction():
            self._db.execute("DELETE FROM attack_results WHERE key = ?", (result["key"],))
            self._db.execute("DELETE FROM gradient_results WHERE key = ?", (result["key"],))
            self._db.execute("DELETE FROM certified_results WHERE key = ?", (result["key"],))
            self._db.execute(
                f"INSERT INTO runs ({columns}) VALUES ({marks}) ON CONFLICT (key) DO UPDATE SET "
                f"{updates}, attempts = runs.attempts + 1", row,
            )
            for a in (metrics or {}).get("attacks", []):
                self._db.execute(
                    "INSERT INTO attack_results VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    (result["key"], a["attack"], a["budget"], a["method"], a["norm"], a["steps"],
                     a["samples"], a["success_rate"], a["robustness"]),
                )
            for g in (metrics or {}).get("gradients", []):
                self._db.execute(
                    f"INSERT INTO gradient_results VALUES (?, ?, ?{', ?' * len(GRADIENT_STATISTICS)})",
                    (result["key"], g["samples"], g["which"], *(g[c] for c in GRADIENT_STATISTICS)),
                )
            for c in (metrics or {}).get("certified", []):
                self._db.execute(
                    "INSERT INTO certified_results VALUES (?, ?, ?, ?, ?, ?)",
                    (result["key"], c["budget"], c["norm"], c["method"], c["certified_accuracy"],
                     c["members_certified"]),
                )

    # ------------------------------------------------------------------ reading
    def statuses(self, keys: Iterable[str] | None = None) -> dict[str, str]:
        """``{key: "ok" | "failed"}`` for the stored runs among ``keys`` (all if None)."""
        rows = self._db.execute("SELECT key, status FROM runs").fetchall()
        wanted = None if keys is None else set(keys)
        return {k: s for k, s in rows if wanted is None or k in wanted}

    def runs(self, keys: Iterable[str] | None = None) -> list[dict]:
        """Stored runs as dicts, configuration, metrics and versions decoded from JSON."""
        cursor = self._db.execute("SELECT * FROM runs ORDER BY recorded, key")
        names = [d[0] for d in cursor.description]
        wanted = None if keys is None else set(keys)
        out = []
        for values in cursor.fetchall():
            row = dict(zip(names, values))
            if wanted is not None and row["key"] not in wanted:
                continue
            for field in ("config", "metrics", "versions", "warnings"):
                row[field] = None if row[field] is None else json.loads(row[field])
            out.append(row)
        return out

    def results(self, keys: Iterable[str] | None = None, wide: bool = False, include_failed: bool = False):
        """Results as a pandas DataFrame.

        Long form (default): one row per run x attack x budget, with the run's
        configuration columns (``dataset`` (a built-in name or a file's name), ``n_train``,
        ``depth``, ``width`` (of the depth-width MLP; None for other architectures),
        ``activation`` (None where the architecture names none), ``architecture`` (``mlp``, a
        builder's or a function's name), ``method``, ``method_settings`` (JSON of the hyper-parameters),
        ``family`` (``deterministic`` or ``Bayesian``), ``seed``), its headline metrics
        (``accuracy``, ``nll``, ``ece``) and ``attack``, ``budget``, ``success_rate``,
        ``robustness``. Wide form: one row per run, with columns
        ``success_rate[<attack>@<budget>]`` and ``robustness[<attack>@<budget>]``, and the
        gradient read-out (:meth:`gradients`) as ``grad_<statistic>[<which>@<S>]``, e.g.
        ``grad_l2_median[expected@16]``, its S = members row also as ``[expected@all]``.
        ``certified_accuracy[<method>-<norm>@<budget>]`` where the run certified (see
        :meth:`certified`). Failed runs appear (with NaN metrics and their ``error``) only
        when asked for.
        """
        import pandas as pd

        runs = [r for r in self.runs(keys) if include_failed or r["status"] == "ok"]
        base = [{**_config_columns(r["config"]), **{c: r[c] for c in _RUN_COLUMNS}} for r in runs]
        long_rows = []
        for info, run in zip(base, runs):
            attacks = (run["metrics"] or {}).get("attacks") or [{}]
            for a in attacks:
                long_rows.append({**info, "attack": a.get("attack"), "budget": a.get("budget"),
                                  "success_rate": a.get("success_rate"), "robustness": a.get("robustness")})
        columns = _CONFIG_COLUMNS + _RUN_COLUMNS + ["attack", "budget", "success_rate", "robustness"]
        frame = pd.DataFrame(long_rows, columns=columns)
        if not wide:
            return frame
        return _widen_certified(_widen_gradients(_widen(frame, base), self.gradients(keys)), self.certified(keys))

    def gradients(self, keys: Iterable[str] | None = None):
        """The expected-gradient read-out as a long pandas DataFrame.

        One row per run x sample count x ``which``: the run's configuration columns (as in
        :meth:`results`), ``key``, ``members`` (the posterior's size), ``samples`` (S; the
        row with ``samples == members`` is "all"), ``which`` (``"expected"``: the S-sample
        expected loss gradient, statistics over points; ``"member"``: single members'
        gradients, over the S members and the points) and ``l2_mean``, ``l2_median``,
        ``l2_p90``, ``linf_mean``, ``linf_median``, ``linf_p90``, ``abs_mean``. Only
        successful runs; a version-1 store gives no rows.
        """
        import pandas as pd

        columns = _CONFIG_COLUMNS + ["key", "members", "samples", "which", *GRADIENT_STATISTICS]
        if not self._has_table("gradient_results"):
            return pd.DataFrame([], columns=columns)
        runs = {r["key"]: r for r in self.runs(keys) if r["status"] == "ok"}
        cursor = self._db.execute("SELECT * FROM gradient_results ORDER BY which, samples")
        names = [d[0] for d in cursor.description]
        stored: dict[str, list[dict]] = {}
        for values in cursor.fetchall():
            row = dict(zip(names, values))
            stored.setdefault(row["key"], []).append(row)
        rows = [{**_config_columns(run["config"]), **row, "members": run["members"]}
                for key, run in runs.items() for row in stored.get(key, [])]  # runs in recorded order
        return pd.DataFrame(rows, columns=columns)

    def certified(self, keys: Iterable[str] | None = None):
        """Certified accuracy per run and budget as a pandas DataFrame (long form).

        One row per run x budget x certificate from table ``certified_results``, beside the
        run's configuration columns (``method`` is the posterior method, as in
        :meth:`results`): ``key``, ``budget``, ``norm``, ``certificate`` (the certifying
        method, ``crown`` or ``ibp``), ``certified_accuracy`` (the share of the evaluation
        points whose posterior predictive is certified and correct) and ``members_certified``
        (the mean share of members certified). A certificate holds for the sampled members
        and the stated ball only.
        """
        import pandas as pd

        names = ["key", "budget", "norm", "certificate", "certified_accuracy", "members_certified"]
        if not self._has_table("certified_results"):  # a version-1 store opened read-only
            return pd.DataFrame([], columns=_CONFIG_COLUMNS + names)
        configs = {r["key"]: _config_columns(r["config"]) for r in self.runs(keys)}
        cursor = self._db.execute("SELECT key, budget, norm, method AS certificate, certified_accuracy, "
                                  "members_certified FROM certified_results ORDER BY key, method, norm, budget")
        names = [d[0] for d in cursor.description]
        rows = [{**configs[values[0]], **dict(zip(names, values))} for values in cursor.fetchall()
                if values[0] in configs]
        return pd.DataFrame(rows, columns=_CONFIG_COLUMNS + names)

    def ensemble_file(self, key: str) -> Path | None:
        """Absolute path of the run's saved ensemble, or None when it was not saved."""
        row = self._db.execute("SELECT ensemble_path FROM runs WHERE key = ?", (key,)).fetchone()
        if row is None or row[0] is None:
            return None
        return (self.path.parent if self.path else Path.cwd()) / row[0]

    def integrity_check(self) -> str:
        """SQLite's ``PRAGMA integrity_check`` answer (``"ok"`` for a sound file)."""
        return "; ".join(r[0] for r in self._db.execute("PRAGMA integrity_check").fetchall())

    def close(self) -> None:
        self._db.close()

    def __enter__(self) -> RunStore:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    # ------------------------------------------------------------------ helpers
    def _read_version(self, path: str) -> int | None:
        """The file's schema version (None for a new, empty file); refuses unknown versions."""
        tables = {r[0] for r in self._db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        if not tables:
            return None
        version = None
        if "store_info" in tables:
            version = self._db.execute("SELECT value FROM store_info WHERE name = 'schema_version'").fetchone()
        if version is None or not str(version[0]).isdigit():
            raise StoreError(f"{path} is not a jostle run store: it has no schema version")
        version = int(version[0])
        if version > SCHEMA_VERSION:
            raise StoreError(f"{path} has store schema {version}, written by a newer jostle; this jostle "
                             f"reads schemas {_READABLE_VERSIONS[0]} to {SCHEMA_VERSION}: upgrade jostle to read it")
        if version not in _READABLE_VERSIONS:
            raise StoreError(f"{path} has store schema {version}; this jostle reads schemas "
                             f"{_READABLE_VERSIONS[0]} to {SCHEMA_VERSION}")
        return version

    def _has_table(self, name: str) -> bool:
        return self._db.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?",
                                (name,)).fetchone() is not None

    def _transaction(self):
        return _Transaction(self._db)

    def _write_ensemble(self, result: dict) -> str | None:
        payload = result.get("ensemble_bytes")
        if not payload:
            return None
        if self.path is None:
            raise StoreError("an in-memory store cannot keep ensembles; give the store a file path")
        folder = self.path.parent / f"{self.path.stem}.ensembles"
        target = folder / f"{result['key']}.safetensors"
        atomic_write(target, payload)
        return str(target.relative_to(self.path.parent))


class _Transaction:
    """``BEGIN IMMEDIATE`` ... ``COMMIT``, rolled back on any exception (Ctrl-C included)."""

    def __init__(self, db: sqlite3.Connection):
        self._db = db

    def __enter__(self) -> None:
        self._db.execute("BEGIN IMMEDIATE")

    def __exit__(self, kind, value, tb) -> None:
        self._db.execute("COMMIT" if kind is None else "ROLLBACK")


def _config_columns(config: dict) -> dict:
    """Columns read from a configuration: ``dataset`` is the built-in name or the file's name;
    ``depth`` and ``width`` are those of the depth-width MLP (None for a builder or your own
    function, whose name is ``architecture``); ``activation`` is the architecture's own, if it names one."""
    method = config["method"]["name"]
    arch = config["architecture"]
    return {
        "dataset": data_label(config["data"]), "n_train": config["data"]["n_train"],
        "depth": arch.get("depth"), "width": arch.get("width"), "activation": arch.get("activation"),
        "architecture": architecture_label(arch), "method": method,
        "method_settings": canonical_json({k: v for k, v in config["method"].items() if k != "name"}),
        "family": "deterministic" if method in DETERMINISTIC_METHODS else "Bayesian",
        "seed": config["seed"],
    }


def _widen_gradients(runs, gradients):
    """Columns ``grad_<statistic>[<which>@<S>]`` per run; the row with S = members also as ``@all``."""
    if gradients.empty:
        return runs
    import pandas as pd

    last = gradients[gradients["samples"] == gradients["members"]].assign(label="all")
    both = pd.concat([gradients.assign(label=gradients["samples"].map(str)), last], ignore_index=True)
    both = both.assign(label=both["which"] + "@" + both["label"])
    pivot = both.pivot_table(index="key", columns="label", values=list(GRADIENT_STATISTICS),
                             aggfunc="first", sort=False)
    pivot.columns = [f"grad_{stat}[{label}]" for stat, label in pivot.columns]
    return runs.merge(pivot, left_on="key", right_index=True, how="left")


def _widen(frame, base: list[dict]):
    import pandas as pd

    runs = pd.DataFrame(base, columns=_CONFIG_COLUMNS + _RUN_COLUMNS)
    scored = frame.dropna(subset=["attack"])
    if scored.empty:
        return runs
    label = scored["attack"] + "@" + scored["budget"].map(lambda b: f"{b:g}")
    pivot = scored.assign(label=label).pivot_table(
        index="key", columns="label", values=["success_rate", "robustness"], aggfunc="first", sort=False,
    )
    pivot.columns = [f"{metric}[{label}]" for metric, label in pivot.columns]
    return runs.merge(pivot, left_on="key", right_index=True, how="left")


def _widen_certified(wide, certified):
    """Add one ``certified_accuracy[<method>-<norm>@<budget>]`` column per certificate and budget."""
    if certified.empty:
        return wide
    label = certified["certificate"] + "-" + certified["norm"] + "@" + certified["budget"].map(lambda b: f"{b:g}")
    pivot = certified.assign(label=label).pivot_table(index="key", columns="label", values="certified_accuracy",
                                                      aggfunc="first", sort=False)
    pivot.columns = [f"certified_accuracy[{c}]" for c in pivot.columns]
    return wide.merge(pivot, left_on="key", right_index=True, how="left")
