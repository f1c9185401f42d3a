"""Subcommands ``jostle fit``, ``jostle sweep run``, ``jostle sweep show`` and ``jostle inspect``.

Every failure a user can cause (a missing or malformed config, an unknown key, a store or
posterior that cannot be read, an unreachable scheduler) ends as one line on stderr and
a non-zero exit code, through :class:`jostle.cli.CommandError`.
"""
from __future__ import annotations

import argparse
import json
from pathlib import Path

from .cli import CommandError

__all__ = ["register"]


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add ``fit``, ``sweep`` (with ``run`` and ``show``) and ``inspect``."""
    fit = subparsers.add_parser(
        "fit", help="fit one posterior from a TOML config and save it",
        description="Fit one run's posterior (fields data, architecture, method, seed) and save it as safetensors.",
    )
    fit.add_argument("config", help="TOML file with [data], [architecture], [method] and seed")
    fit.add_argument("--out", required=True, help="where to write the posterior (.safetensors)")
    fit.set_defaults(handler=_fit)

    sweep = subparsers.add_parser("sweep", help="run or show a robustness-against-accuracy sweep",
                                  description="Run a sweep defined in TOML, or show a store's results.")
    actions = sweep.add_subparsers(dest="sweep_command", metavar="ACTION")
    sweep.set_defaults(handler=lambda args: _missing_action(sweep))
    run = actions.add_parser("run", help="execute the runs of a sweep not yet in the store",
                             description="Execute the runs of a sweep that the store lacks (failed ones are retried).")
    run.add_argument("config", help="TOML file with a [sweep] table")
    run.add_argument("--store", required=True, help="SQLite file for the results (created if missing)")
    run.add_argument("--scheduler", metavar="ADDR", help="Dask scheduler address, e.g. tcp://host:8786 (default: run here)")
    run.add_argument("--connect-timeout", type=float, default=10.0, metavar="SECONDS",
                     help="how long to wait for the scheduler (default 10)")
    run.add_argument("--save-ensembles", action="store_true", help="save each fitted posterior beside the store")
    run.add_argument("--skip-failed", action="store_true", help="do not retry runs stored as failed")
    run.add_argument("--quiet", action="store_true", help="no progress bar")
    run.set_defaults(handler=_sweep_run, command="sweep run")
    show = actions.add_parser("show", help="print a store's runs as a table",
                              description="Print one line per run: configuration, metrics, attack results.")
    show.add_argument("store", help="SQLite file written by 'jostle sweep run'")
    show.add_argument("--failed", action="store_true", help="list failed runs with their errors instead")
    show.set_defaults(handler=_sweep_show, command="sweep show")

    inspect = subparsers.add_parser("inspect", help="print a saved posterior's metadata and diagnostics",
                                    description="Print the metadata of a .safetensors posterior without loading its tensors.")
    inspect.add_argument("path", help="a posterior written by ens.save or 'jostle fit'")
    inspect.set_defaults(handler=_inspect)


def _fit(args: argparse.Namespace) -> int:
    from .sweep_config import SweepConfigError, check_run, read_toml
    from .sweep_run import evaluate, fit_run

    out = Path(args.out)
    if out.suffix != ".safetensors":
        raise CommandError(f"--out must end in .safetensors; got {str(out)!r}")
    try:
        config = check_run(read_toml(args.config), where=Path(args.config).name, need_evaluation=False)
    except SweepConfigError as err:
        raise CommandError(str(err)) from None
    try:
        ens, data = fit_run(config)
    except (ValueError, TypeError, RuntimeError) as err:
        raise CommandError(f"fit failed: {err}".splitlines()[0]) from None
    ens.save(str(out))
    scores = evaluate(ens, data, {**_NO_ATTACKS, **config.get("evaluation", {}), "attacks": []}, seed=config["seed"])
    print(f"wrote {out}: {len(ens)} member(s), method {config['method']['name']}, "
          f"test accuracy {scores['accuracy']:.3f}, NLL {scores['nll']:.3f}, ECE {scores['ece']:.3f}")
    return 0


_NO_ATTACKS = {"budgets": [], "points": 1, "ece_bins": 15, "target": "predicted"}


def _sweep_run(args: argparse.Namespace) -> int:
    from .sweep import Sweep
    from .sweep_config import SweepConfigError

    try:
        sweep = Sweep.from_toml(args.config)
    except SweepConfigError as err:
        raise CommandError(str(err)) from None
    client = _connect(args.scheduler, args.connect_timeout) if args.scheduler else None
    try:
        summary = sweep.run(store=args.store, client=client, save_ensembles=args.save_ensembles,
                            retry_failed=not args.skip_failed, progress_bar=not args.quiet)
    finally:
        if client is not None:
            client.close()
    print(f"{sweep.name}: {summary.total} runs, {summary.skipped} already stored, "
          f"{summary.finished} finished, {summary.failed} failed -> {args.store}")
    return 0 if summary.failed == 0 else 3


def _sweep_show(args: argparse.Namespace) -> int:
    import pandas as pd

    frame = _read_results(args.store)
    if args.failed:
        failed = frame[frame["status"] == "failed"]
        for _, row in failed.iterrows():
            print(f"{row['key'][:12]}  {row['method']:<14} seed {row['seed']}: {row['error']}")
        print(f"{len(failed)} failed run(s)")
        return 0
    ok = frame[frame["status"] == "ok"].drop(
        columns=["sweep", "status", "fit_seconds", "eval_seconds", "worker", "attempts", "error", "family",
                 "members"], errors="ignore")
    ok = ok.assign(key=ok["key"].str[:12], saved=ok["ensemble_path"].notna()).drop(columns=["ensemble_path"])
    with pd.option_context("display.width", 200, "display.max_columns", None, "display.max_rows", None):
        print(ok.to_string(index=False, float_format=lambda v: f"{v:.3f}") if len(ok) else "(no finished runs)")
    failed = int((frame["status"] == "failed").sum())
    print(f"{len(ok)} finished run(s), {failed} failed" + (" (see --failed)" if failed else ""))
    return 0


def _inspect(args: argparse.Namespace) -> int:
    from .storage import FormatError, read_metadata

    try:
        header = read_metadata(args.path)
    except (FileNotFoundError, FormatError) as err:
        raise CommandError(str(err)) from None
    meta = dict(header.get("meta", {}))
    print(f"file: {args.path}")
    print(f"format: {header.get('format')} version {header.get('format_version')}")
    print(f"members: {header.get('members')}")
    diagnostics = meta.pop("diagnostics", None)
    for key in sorted(meta):
        print(f"{key}: {json.dumps(meta[key], sort_keys=True)}")
    if diagnostics is None:
        print("diagnostics: none recorded")
    elif isinstance(diagnostics, dict):
        print("diagnostics:")
        for key in sorted(diagnostics):
            print(f"  {key}: {json.dumps(diagnostics[key], sort_keys=True)}")
    else:
        print(f"diagnostics: {json.dumps(diagnostics, sort_keys=True)}")
    return 0


def _read_results(path: str):
    from .store import RunStore, StoreError

    try:
        with RunStore(path, readonly=True) as db:
            return db.results(wide=True, include_failed=True)
    except (FileNotFoundError, StoreError) as err:
        raise CommandError(str(err)) from None


def _connect(address: str, timeout: float):
    try:
        from distributed import Client
    except ImportError:
        raise CommandError("--scheduler needs dask.distributed; pip install 'jostle[cluster]'") from None
    try:
        return Client(address, timeout=timeout)
    except (OSError, TimeoutError, ValueError) as err:
        raise CommandError(f"cannot reach the scheduler at {address}: {err}".splitlines()[0]) from None


def _missing_action(parser: argparse.ArgumentParser) -> int:
    parser.print_usage()
    raise CommandError("choose an action: run or show")
