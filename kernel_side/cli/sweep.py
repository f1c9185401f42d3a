"""Subcommands ``jostle fit``, ``jostle sweep run``, ``jostle sweep show`` and ``jostle inspect``.

Every failure a user can cause (a missing or malformed config, an unknown key, a store or
posterior that cannot be read, an unreachable scheduler) ends as one line on stderr and
a non-zero exit code, through :class:`jostle.cli.CommandError`.
"""
from __future__ import annotations

import argparse
import json
from pathlib import Path

from jostle.attacks.run import attack_choices
from jostle.cli.errors import CommandError

__all__ = ["register", "attack_help"]


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
                             description="Execute the runs of a sweep that the store lacks (failed ones are retried).",
                             epilog=attack_help(), formatter_class=argparse.RawDescriptionHelpFormatter)
    run.add_argument("config", help="TOML file with a [sweep] table")
    run.add_argument("--store", required=True, help="SQLite file for the results (created if missing)")
    run.add_argument("--scheduler", metavar="ADDR",
                     help="Dask scheduler address, e.g. tcp://host:8786 (default: run here)")
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

    inspect = subparsers.add_parser(
        "inspect", help="print a saved posterior's metadata and diagnostics",
        description="Print the metadata of a .safetensors posterior without loading its tensors.",
    )
    inspect.add_argument("path", help="a posterior written by ens.save or 'jostle fit'")
    inspect.set_defaults(handler=_inspect)


def attack_help() -> str:
    """The attack methods a sweep's ``evaluation.attacks`` may name, from the attack registry."""
    lines = ["attack methods for [sweep.evaluation] attacks (norms and objectives: default first):"]
    for name, choice in attack_choices().items():
        lines.append(f"  {name:<8} {choice['description']}; norms {', '.join(choice['norms'])}; "
                     f"objectives {', '.join(choice['objectives'])}")
    return "\n".join(lines)


def _fit(args: argparse.Namespace) -> int:
    from jostle.sweeps.one_run import evaluate, fit_run
    from jostle.sweeps.spec import SweepConfigError, check_run, read_toml

    out = Path(args.out)
    if out.suffix != ".safetensors":
        raise CommandError(f"--out must end in .safetensors; got {str(out)!r}")
    try:
        config = check_run(read_toml(args.config), where=Path(args.config).name, need_evaluation=False,
                           paths_from=Path(args.config).resolve().parent)
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
    from jostle.sweeps.spec import SweepConfigError
    from jostle.sweeps.sweep import Sweep

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
    frame, gradients, certified, notes = _read_results(args.store)
    for note in notes:
        print(f"note: {note}")
    if args.failed:
        failed = frame[frame["status"] == "failed"].drop_duplicates("key")
        for _, row in failed.iterrows():
            print(f"{row['key'][:12]}  {row['method']:<14} seed {row['seed']}: {row['error']}")
        print(f"{len(failed)} failed run(s)")
        return 0
    runs = frame[frame["status"] == "ok"]
    failed = int(frame.loc[frame["status"] == "failed", "key"].nunique())
    if len(runs):
        print(_readable_table(runs))
        if len(gradients):
            print()
            print(_gradient_table(gradients))
        if len(certified):
            print()
            print(_certified_table(certified))
    else:
        print("(no finished runs)")
    print(f"{runs['key'].nunique()} finished run(s), {failed} failed" + (" (see --failed)" if failed else ""))
    return 0


def _readable_table(runs) -> str:
    """One line per run and attack; a cell per budget holds 'success rate / softmax robustness'.

    Columns that are the same for every run move to a line above the table.
    """
    import pandas as pd

    # depth and width belong to the depth-width MLP; other architectures (and those naming no activation) show "-"
    runs = runs.assign(**{c: runs[c].map(_or_dash) for c in ("depth", "width", "activation")})
    runs = runs.assign(settings=runs["method_settings"].map(_settings_text), key=runs["key"].str[:12],
                       saved=runs["ensemble_path"].notna().map({True: "yes", False: "no"}),
                       cell=[f"{s:.2f} / {r:.3f}" for s, r in zip(runs["success_rate"], runs["robustness"])])
    table = runs.pivot_table(index=_SHOW_RUN_COLUMNS + ["attack"], columns="budget", values="cell",
                             aggfunc="first", sort=False)
    table.columns = [f"eps={b:g}" for b in table.columns]
    table = table.reset_index()
    shared = [c for c in _SHOW_SHARED if table[c].nunique() == 1]
    header = ", ".join(f"{c} {table[c].iloc[0]}" for c in shared)
    table = table.drop(columns=shared)
    with pd.option_context("display.width", 250, "display.max_columns", None, "display.max_rows", None,
                           "display.max_colwidth", 40):
        text = table.to_string(index=False, float_format=lambda v: f"{v:.3f}")
    return (f"all runs: {header}\n" if header else "") + "cells: attack success rate / softmax robustness\n" + text


def _gradient_table(gradients) -> str:
    """One line per run; a cell per sample count S holds 'expected / single member' median L2 norms."""
    import pandas as pd

    medians = gradients.pivot_table(index=["key", "samples"], columns="which", values="l2_median",
                                    aggfunc="first", sort=False).reset_index()
    medians["cell"] = [f"{e:.3g} / {m:.3g}" for e, m in zip(medians["expected"], medians["member"])]
    runs = gradients.drop_duplicates("key").set_index("key")
    table = medians.pivot_table(index="key", columns="samples", values="cell", aggfunc="first", sort=False)
    table.columns = [f"S={s}" for s in table.columns]
    table = table.reindex(sorted(table.columns, key=lambda c: int(c[2:])), axis=1)
    info = runs.loc[table.index, ["method", "width", "n_train", "seed", "members"]]
    info = info.assign(width=info["width"].map(_or_dash))  # MLP widths only
    table = pd.concat([info, table.fillna("-")], axis=1).reset_index()
    table["key"] = table["key"].str[:12]
    with pd.option_context("display.width", 250, "display.max_columns", None, "display.max_rows", None):
        text = table.to_string(index=False)
    return ("expected loss gradient at the evaluation points, median L2 norm over points: "
            "expected over S members / single member (S = members is all of them)\n" + text)


_SHOW_SHARED = ["dataset", "n_train", "depth", "width", "activation", "architecture"]
_SHOW_RUN_COLUMNS = ["key"] + _SHOW_SHARED + ["method", "settings", "seed", "accuracy", "nll", "ece", "saved"]


def _certified_table(certified) -> str:
    """One line per run and certificate; a cell per budget holds 'certified accuracy / members certified'."""
    import pandas as pd

    certified = certified.assign(
        key=certified["key"].str[:12], certificate=certified["certificate"] + "-" + certified["norm"],
        settings=certified["method_settings"].map(_settings_text),
        cell=[f"{a:.2f} / {m:.2f}" for a, m in zip(certified["certified_accuracy"], certified["members_certified"])])
    table = certified.pivot_table(index=["key", "method", "settings", "seed", "certificate"], columns="budget",
                                  values="cell", aggfunc="first", sort=False)
    table.columns = [f"eps={b:g}" for b in table.columns]
    with pd.option_context("display.width", 250, "display.max_columns", None, "display.max_rows", None):
        text = table.reset_index().to_string(index=False)
    return ("certified: certified accuracy (predictive provably unflipped and correct) / mean share of members "
            "certified; a certificate holds for the sampled members and the stated ball only\n" + text)


def _or_dash(value):
    """A cell of a column only some architectures fill: "-" where empty, whole numbers as integers."""
    if value is None or (isinstance(value, float) and value != value):
        return "-"
    return int(value) if isinstance(value, float) and value.is_integer() else value


def _settings_text(settings: str) -> str:
    values = json.loads(settings) if settings else {}
    return " ".join(f"{k}={v}" for k, v in sorted(values.items())) or "-"


def _inspect(args: argparse.Namespace) -> int:
    from jostle.files.posterior_file import FormatError, read_metadata

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
    """Long results, the gradient read-out, certified accuracy and the store's notices (an old schema)."""
    import warnings

    from jostle.sweeps.results_db import OldStoreWarning, RunStore, StoreError

    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", OldStoreWarning)
            with RunStore(path, readonly=True) as db:
                frame, gradients, certified = db.results(include_failed=True), db.gradients(), db.certified()
    except (FileNotFoundError, StoreError) as err:
        raise CommandError(str(err)) from None
    notes = [str(w.message) for w in caught if issubclass(w.category, OldStoreWarning)]
    for w in caught:
        if not issubclass(w.category, OldStoreWarning):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return frame, gradients, certified, notes


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
