"""Command line: a thin shell over runs, report, export and sweeps.

Exit codes: 0 ok, 1 failure during work, 2 bad usage or bad input (one line on stderr,
no traceback). ``--json`` prints one machine-readable JSON object on stdout.
"""

from __future__ import annotations

import argparse
import difflib
import json
import os
import sys
import time
from pathlib import Path

from hilbertune.errors import HilbertuneError, InvalidInputError

EXIT_OK, EXIT_FAILURE, EXIT_USAGE = 0, 1, 2
# bundled dataset names (kept in step with hilbertune.data.BUNDLED_NAMES, which a test checks;
# not imported here so that `--help` and usage errors stay fast)
BUNDLED_NAMES = ("iris", "wine", "breast_cancer", "digits", "moons", "circles")
DATA_SUFFIXES = (".csv", ".tsv", ".txt", ".dat")


class _Parser(argparse.ArgumentParser):
    """argparse, but usage errors are one line and exit 2."""

    def error(self, message):
        raise InvalidInputError(f"{message} (see `{self.prog} --help`)")


def _default_out(kind: str) -> Path:
    return Path("runs") / f"{kind}-{time.strftime('%Y%m%d-%H%M%S')}"


def _add_common(p):
    p.add_argument("--quiet", action="store_true", help="print nothing but errors")
    p.add_argument("--json", action="store_true", help="print one JSON object with the results")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="hilbertune", description=(
        "Learn a data-encoding circuit for a quantum kernel on your classification data, "
        "diagnose it, compare it with tuned classical kernels, estimate its hardware cost, "
        "and export it. Everything is simulated on the CPU."))
    parser.add_argument("--version", action="version", version=_version())
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    demo = sub.add_parser("demo", help="run the whole job on an invented built-in dataset")
    demo.add_argument("--out", type=Path, help="run directory (default: runs/demo-<time>)")
    demo.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    demo.add_argument("--overwrite", action="store_true",
                      help="write into an existing run directory")
    _add_common(demo)

    fit = sub.add_parser("fit", help="learn, freeze, evaluate and report on a dataset")
    fit.add_argument("config", nargs="?", type=Path, help="TOML configuration file")
    fit.add_argument("--data", help="CSV file with a header row, or a scikit-learn dataset "
                     "name (iris, wine, breast_cancer, digits, moons, circles), or 'demo'")
    fit.add_argument("--target", help="label column of the CSV")
    fit.add_argument("--qubits", type=int, help="number of qubits")
    fit.add_argument("--seed", type=int, help="random seed")
    fit.add_argument("--out", type=Path, help="run directory (default: runs/fit-<time>)")
    fit.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                     help="override a config key, e.g. --set training.steps=100 (repeatable)")
    fit.add_argument("--drop-missing", action="store_true",
                     help="drop CSV rows with missing values instead of failing")
    fit.add_argument("--overwrite", action="store_true",
                     help="write into an existing run directory (other files are kept)")
    fit.add_argument("--help-config", action="store_true",
                     help="list every config key with its default and exit")
    _add_common(fit)

    predict = sub.add_parser("predict", help="apply a finished run to new rows of a CSV")
    predict.add_argument("run_dir", type=Path)
    predict.add_argument("csv", type=Path, help="CSV with the same feature columns")
    predict.add_argument("--out", type=Path, help="write predictions here (default: stdout)")
    predict.add_argument("--overwrite", action="store_true",
                         help="allow --out to be the input CSV (never a run artifact)")
    _add_common(predict)

    report = sub.add_parser("report", help="rebuild report.html of a run from its artifacts")
    report.add_argument("run_dir", type=Path)
    _add_common(report)

    export = sub.add_parser("export", help="export the learned circuit")
    export.add_argument("run_dir", type=Path)
    export.add_argument("--format", default="qasm3", choices=["qasm3"])
    export.add_argument("--kernel-circuit", action="store_true",
                        help="export the circuit that estimates one kernel entry instead")
    export.add_argument("--out", type=Path, help="file to write (default: print)")
    export.add_argument("--overwrite", action="store_true", help=argparse.SUPPRESS)
    _add_common(export)

    reproduce = sub.add_parser("reproduce", help="rerun a run from its config and seed and "
                               "compare parameters and metrics")
    reproduce.add_argument("run_dir", type=Path)
    reproduce.add_argument("--keep", type=Path, help="keep the rerun in this directory")
    reproduce.add_argument("--overwrite", action="store_true",
                           help="replace the run in an existing --keep directory")
    reproduce.add_argument("--data", type=Path, help="the run's CSV file, when its saved path "
                           "does not reach it from here (checked against the recorded SHA-256)")
    _add_common(reproduce)

    sweep = sub.add_parser("sweep", help="run many configurations from a sweep TOML")
    sweep.add_argument("description", type=Path, help="sweep TOML file")
    sweep.add_argument("--out", type=Path, help="sweep directory (default: runs/sweep-<time>)")
    sweep.add_argument("--workers", type=int, default=1, help="parallel trials (default 1)")
    sweep.add_argument("--scheduler", help="Dask scheduler address tcp://HOST:PORT, or "
                       "'local' for a cluster on this machine")
    sweep.add_argument("--max-trials", type=int, default=None, metavar="N",
                       help="refuse sweeps of more than N trials (default 1000)")
    _add_common(sweep)
    return parser


def _version() -> str:
    from hilbertune import __version__

    return f"hilbertune {__version__}"


class _Console:
    def __init__(self, quiet: bool, as_json: bool):
        self.quiet = quiet or as_json
        self.as_json = as_json

    def say(self, text: str) -> None:
        if not self.quiet:
            print(text, flush=True)


def _fit_config(args):
    from hilbertune import config as cfg

    if args.config and args.config.suffix.lower() in DATA_SUFFIXES:
        raise InvalidInputError(f"{str(args.config)!r} looks like a data file, but the first "
                                "argument of `fit` is a TOML config; pass the data with "
                                f"--data {args.config} --target COLUMN")
    user = cfg.load_toml(args.config) if args.config else {}
    overrides = []
    if args.data:
        known = ("demo",) + BUNDLED_NAMES
        if args.data in known:
            overrides.append(("data.source", args.data))
        else:
            if not Path(args.data).exists():
                close = difflib.get_close_matches(args.data, known, n=1)
                hint = f"did you mean {close[0]!r}? " if close else ""
                raise InvalidInputError(f"data file {args.data!r} does not exist; {hint}pass an "
                                        "existing CSV file or one of the dataset names "
                                        f"{', '.join(known)}")
            overrides += [("data.source", "csv"), ("data.path", str(args.data))]
    if args.target:
        overrides.append(("data.target", args.target))
    if args.drop_missing:
        overrides.append(("data.drop_missing", True))
    if args.qubits is not None:
        overrides.append(("encoding.qubits", args.qubits))
    if args.seed is not None:
        overrides.append(("seed", args.seed))
    overrides += [cfg.parse_assignment(item) for item in args.set]
    config = cfg.resolve_config(user, overrides)
    encoding = user.get("encoding")
    if args.qubits is not None or any(key == "encoding.qubits" for key, _ in overrides) or (
            isinstance(encoding, dict) and "qubits" in encoding):
        from hilbertune.runs import check_qubit_request

        check_qubit_request(config)
    return config


def _print_summary(console, summary, run_dir):
    if console.quiet:
        return
    from hilbertune.runs import summary_lines

    for line in summary_lines(summary):
        console.say(line)
    console.say(f"Report: {Path(run_dir) / 'report.html'}")


def _cmd_demo(args, console):
    from hilbertune import config as cfg
    from hilbertune.runs import execute_fit

    config = cfg.resolve_config({"seed": args.seed, "data": {"source": "demo"}})
    out = args.out or _default_out("demo")
    console.say(f"hilbertune demo: invented dataset, {config['encoding']['qubits']} qubits, "
                f"run directory {out}")
    summary = execute_fit(config, out, overwrite=args.overwrite, progress=not console.quiet)
    _print_summary(console, summary, out)
    return {"run_dir": str(out), "summary": summary}


def _cmd_fit(args, console):
    from hilbertune import config as cfg
    from hilbertune.runs import execute_fit

    if args.help_config:
        print(cfg.describe())
        return None
    config = _fit_config(args)
    out = args.out or _default_out("fit")
    summary = execute_fit(config, out, overwrite=args.overwrite, progress=not console.quiet)
    _print_summary(console, summary, out)
    return {"run_dir": str(out), "summary": summary}


def _check_out_file(path, run_dir, inputs=(), overwrite=False) -> None:
    if path is not None:
        from hilbertune.runs import check_output_path

        check_output_path(path, run_dir=run_dir, inputs=inputs, overwrite=overwrite)


def _cmd_predict(args, console):
    from hilbertune.runs import predict_csv

    _check_out_file(args.out, args.run_dir, [args.csv], args.overwrite)
    rows = predict_csv(args.run_dir, args.csv)
    text = "row,prediction\n" + "".join(f"{i},{label}\n" for i, label in enumerate(rows))
    if args.out:
        from hilbertune.artifacts import write_text

        write_text(args.out, text)
        console.say(f"{len(rows)} predictions written to {args.out}")
    elif not args.json:
        sys.stdout.write(text)
    return {"predictions": [str(r) for r in rows]}


def _cmd_report(args, console):
    from hilbertune import rundir
    from hilbertune.artifacts import record_rebuilt
    from hilbertune.report import build_report
    from hilbertune.runs import load_run

    # every check that predict and export make, but for the report itself: it is derived
    # from the other files, and rebuilding it is how a run gets a newer version's report
    load_run(args.run_dir, rebuilt=("report.html",))
    with rundir.exclusive(args.run_dir, option=None):
        load_run(args.run_dir, rebuilt=("report.html",))  # again under the lock
        path = build_report(args.run_dir)
        record_rebuilt(args.run_dir, "report.html")  # predict, export, reproduce accept it
    console.say(f"Report rebuilt: {path}")
    return {"report": str(path)}


def _cmd_export(args, console):
    from hilbertune.runs import export_circuit

    _check_out_file(args.out, args.run_dir)
    text, resources = export_circuit(args.run_dir, kernel_circuit=args.kernel_circuit)
    if args.out:
        from hilbertune.artifacts import write_text

        write_text(args.out, text)
        console.say(f"OpenQASM 3 written to {args.out}")
    elif not args.json:
        sys.stdout.write(text)
    console.say("resources: " + ", ".join(f"{k} {v}" for k, v in resources.items()))
    return {"resources": resources, "qasm": text}


def _cmd_reproduce(args, console):
    from hilbertune.runs import reproduce_run

    same, differences, notes = reproduce_run(args.run_dir, keep=args.keep,
                                             overwrite=args.overwrite, data=args.data,
                                             progress=not console.quiet)
    for note in notes:
        console.say(f"note: {note}")
    if same:
        console.say("reproduced: parameters and metrics are identical")
    else:
        for line in differences:
            print(f"difference: {line}", file=sys.stderr)
    result = {"identical": same, "differences": differences, "mapped_names": notes}
    return result, (EXIT_OK if same else EXIT_FAILURE)


def _cmd_sweep(args, console):
    from hilbertune import config as cfg
    from hilbertune.sweeps import run_sweep

    if args.workers < 1:
        raise InvalidInputError(f"--workers must be at least 1, got {args.workers}")
    if args.max_trials is not None and args.max_trials < 1:
        raise InvalidInputError(f"--max-trials must be at least 1, got {args.max_trials}")
    description = cfg.load_toml(args.description)
    max_trials = args.max_trials
    _check_sweep_inputs(description, args.workers, args.scheduler, max_trials)
    out = args.out or _default_out("sweep")
    rows = run_sweep(description, out, workers=args.workers, scheduler=args.scheduler,
                     progress=not console.quiet, max_trials=max_trials)
    failed = sum(1 for r in rows if r.get("status") != "ok")
    console.say(f"{len(rows)} trials, {failed} failed; table: {Path(out) / 'results.csv'}")
    if failed:
        print(f"hilbertune: failed: {failed} of {len(rows)} trials failed; see "
              f"{Path(out) / 'errors'} and rerun the sweep to retry them", file=sys.stderr)
    result = {"sweep_dir": str(out), "trials": len(rows), "failed": failed}
    return result, (EXIT_FAILURE if failed else EXIT_OK)


def _check_sweep_inputs(description, workers: int, scheduler, max_trials=None) -> None:
    """Load the data and build the encoding of every distinct trial before any trial runs,
    so bad data or too many qubits stop the sweep up front (exit 2) instead of failing
    every trial; parallel trials on this machine must fit in its memory together."""
    from hilbertune.circuits import is_product, state_memory_bytes
    from hilbertune.errors import ResourceLimitError
    from hilbertune.runs import check_inputs, check_qubit_request
    from hilbertune.sweeps import plan_sweep

    plan = plan_sweep(description, max_trials=max_trials)
    base = description.get("base", {})
    qubits_given = "encoding.qubits" in plan.swept_keys or (
        "encoding.qubits" in base or "qubits" in (base.get("encoding") or {}))
    seen, largest = set(), 0
    for trial in plan.trials:
        c = trial.config
        key = json.dumps([c["seed"], c["data"], c["encoding"], c["compute"]], sort_keys=True)
        if key in seen:
            continue
        seen.add(key)
        try:
            _, _, blueprint, split = check_inputs(c)
            if qubits_given:
                check_qubit_request(c)
        except InvalidInputError as exc:
            swept = ", ".join(f"{k}={v!r}" for k, v in trial.assignments)
            raise type(exc)(f"sweep trial {trial.trial_id} ({swept}): {exc}") from None
        if not is_product(blueprint):
            largest = max(largest, state_memory_bytes(
                len(split.X_train) + len(split.X_test), blueprint.n_qubits))
    parallel = min(workers, len(plan.trials))
    local = scheduler is None or scheduler == "local"
    physical = _physical_memory()
    if local and physical and parallel > 1 and largest * parallel > physical:
        raise ResourceLimitError(
            f"{parallel} parallel trials need at least {largest * parallel / 2**30:.2f} GiB "
            f"for their statevectors ({largest / 2**30:.2f} GiB each) but this machine has "
            f"{physical / 2**30:.2f} GiB; use fewer --workers or fewer qubits")


def _physical_memory() -> int:
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return 0


def _one_line(exc) -> str:
    # messages may quote user text (a key, a cell, a path) that holds line breaks
    return " ".join(str(exc).split())


COMMANDS = {"demo": _cmd_demo, "fit": _cmd_fit, "predict": _cmd_predict,
            "report": _cmd_report, "export": _cmd_export, "reproduce": _cmd_reproduce,
            "sweep": _cmd_sweep}


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    # with --json a failure is one JSON object on stdout too (the line on stderr stays)
    as_json = "--json" in argv
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
        as_json = bool(getattr(args, "json", False))
        if not args.command:
            parser.print_help()
            return EXIT_USAGE
        console = _Console(args.quiet, args.json)
        result = COMMANDS[args.command](args, console)
        code = EXIT_OK
        if isinstance(result, tuple):
            result, code = result
        if args.json and result is not None:
            print(json.dumps(result, default=str, sort_keys=True))
        return code
    except InvalidInputError as exc:
        return _fail(as_json, "error", _one_line(exc), EXIT_USAGE)
    except HilbertuneError as exc:
        return _fail(as_json, "failed", _one_line(exc), EXIT_FAILURE)
    except KeyboardInterrupt:
        return _fail(as_json, "interrupted", "finished artifacts and checkpoints are kept, "
                     "rerun the same command to resume", 130, separator="; ")
    except MemoryError:
        return _fail(as_json, "failed", "out of memory; use fewer qubits or samples, or a "
                     "smaller compute.memory_budget", EXIT_FAILURE)
    except OSError as exc:
        return _fail(as_json, "failed", f"{exc.strerror or exc} ({exc.filename or ''}); check "
                     "the path and permissions", EXIT_FAILURE)


def _fail(as_json: bool, kind: str, message: str, code: int, separator: str = ": ") -> int:
    print(f"hilbertune: {kind}{separator}{message}", file=sys.stderr)
    if as_json:
        print(json.dumps({"error": message, "kind": kind, "exit_code": code}, sort_keys=True))
    return code


if __name__ == "__main__":
    os.environ.setdefault("PYTHONWARNINGS", "ignore")
    sys.exit(main())
