"""Sweeps: many run configurations from one description, run in parallel, one results table.

Place in the data flow: a thin shell *around* ``runs.execute_fit``. A sweep description
(a TOML file read into a dict) names a base configuration and the keys to vary; each
combination becomes a trial with its own run directory. Trials run one after another,
in local worker processes (joblib), or on a Dask cluster (a loopback ``LocalCluster`` or
a running scheduler). ``results.csv`` is rewritten atomically after every finished trial,
so an interrupted sweep resumes where it stopped.

Sweep description (TOML)::

    [sweep]                    # optional
    name = "qubits-vs-steps"   # shown in the report
    metric = "selection.cv_accuracy"   # flattened summary key that ranks the trials
    higher_is_better = true

    [base]                     # any run configuration (same sections as `hilbertune fit`)
    seed = 3
    data.source = "moons"

    [grid]                     # dotted key -> list of values: the cartesian product
    "encoding.qubits" = [2, 3, 4]
    "training.steps" = [20, 60]

    [random]                   # `count` draws of these keys, reproducible from `seed`
    count = 4
    seed = 0                   # the draw seed (a table here would sweep the run seed)
    "training.learning_rate" = {log_uniform = [0.005, 0.2]}
    "encoding.layers" = {int = [1, 3]}          # both ends included
    "encoding.entangler" = {choice = ["ring", "linear"]}
    "encoding.bias_scale" = {uniform = [0.0, 0.3]}

Grid and random combined: every grid point is run with each of the ``count`` random draws
(``grid points x count`` trials). The draws are the same for every grid point, so grid
settings are compared on paired random settings. A key may be in only one of the two.
Keys may be written quoted (``"training.steps" = [...]``) or as TOML dotted keys
(``training.steps = [...]``); both mean the same.

Trials are ranked by ``selection.cv_accuracy`` by default: the inner cross-validation
accuracy of the chosen kernel on the training part. Test accuracy stays in results.csv and
the report, labelled "not used for ranking": picking the best of many trials by their
single-split test accuracy would select on the test rows.

Before any trial runs the sweep's size is counted (grid points x draws, nothing built) and
refused above ``max_trials`` (default ``DEFAULT_MAX_TRIALS``; ``--max-trials`` raises it).

Run directory layout of a sweep::

    out_dir/sweep.json          description, its hash, the trial list
    out_dir/results.csv         one row per finished trial (ok or failed)
    out_dir/trials/<trial-id>/  the run directory of each trial
    out_dir/errors/<trial-id>.txt   traceback of each failed trial
    out_dir/sweep_report.html   sorted table and plots (self-contained)
"""

from __future__ import annotations

import base64
import difflib
import hashlib
import html
import io
import itertools
import json
import logging
import math
import os
import socket
import sys
import tempfile
import time
import traceback
from pathlib import Path
from typing import NamedTuple
from urllib.parse import urlparse

import numpy as np

from hilbertune import artifacts
from hilbertune import config as cfg
from hilbertune.errors import ArtifactError, InvalidInputError

SWEEP_FORMAT_VERSION = 1
DEFAULT_METRIC = "selection.cv_accuracy"
DEFAULT_MAX_TRIALS = 1000
# metrics measured on each trial's test rows: shown, never used to rank
TEST_SPLIT_METRICS = ("test_accuracy", "untrained_test_accuracy",
                      "baselines.rbf_svm.test_accuracy", "baselines.linear_svm.test_accuracy")
DISTRIBUTIONS = ("choice", "uniform", "log_uniform", "int")
SWEEP_OPTIONS = {"name": str, "metric": str, "higher_is_better": bool}
TABLES = ("sweep", "base", "grid", "random")
FIXED_COLUMNS = ("trial_id", "status", "rank", "ranked_by", "error", "seconds")
# Summary keys the report's table shows next to the swept keys (when present).
REPORT_METRICS = (DEFAULT_METRIC, "test_accuracy", "train_accuracy", "untrained_test_accuracy",
                  "alignment.initial", "alignment.final", "baselines.rbf_svm.test_accuracy",
                  "baselines.linear_svm.test_accuracy")
BASELINE_LINES = (("baselines.rbf_svm.test_accuracy", "tuned RBF SVM", "--"),
                  ("baselines.linear_svm.test_accuracy", "linear SVM", ":"))
# XLA's Eigen thread pool off in worker processes. In jax 0.10 this flag is still accepted
# but no longer limits XLA:CPU's own intra-op pool (measured: same number of busy threads),
# so workers are also pinned to their own CPUs, from which XLA sizes its pool.
WORKER_XLA_FLAG = "--xla_cpu_multi_thread_eigen=false"
_CPU_LOCK_DIR = "hilbertune-cpu-slots"
_ALLOWED_CPUS_VAR = "HILBERTUNE_ALLOWED_CPUS"


class Trial(NamedTuple):
    """One configuration of a sweep."""
    trial_id: str        # 12 hex digits of the SHA-256 of the resolved config (stable)
    index: int           # position in the sweep, 0-based
    assignments: tuple   # ((dotted key, value), ...): the swept values of this trial
    config: dict         # the fully resolved run configuration


class SweepPlan(NamedTuple):
    """A validated sweep description: every trial resolved before anything runs."""
    name: str
    metric: str               # flattened summary key, e.g. "test_accuracy"
    higher_is_better: bool
    swept_keys: tuple         # dotted keys in the order grid, then random
    trials: tuple             # Trial, ...; duplicate configurations appear once
    description_hash: str     # SHA-256 of the normalized description (without [sweep])
    normalized: dict          # {"base": resolved config, "grid": {...}, "random": {...}}


# --------------------------------------------------------------------------- planning

def _closest_key(key: str) -> str:
    keys = cfg.all_keys()
    close = difflib.get_close_matches(key, keys, n=1, cutoff=0.5)
    if not close:  # an option name without its section
        close = [k for k in keys if k.split(".")[-1] == key.split(".")[-1]][:1]
    return f"; did you mean '{close[0]}'?" if close else "; see `hilbertune fit --help-config`"


def _check_key(table: str, key: str) -> None:
    if key in cfg.RETIRED_KEYS:
        raise InvalidInputError(f"sweep [{table}]: {cfg.retired_key_error(key)}")
    if key not in cfg.all_keys():
        raise InvalidInputError(f"sweep [{table}]: unknown config key '{key}'{_closest_key(key)}")


def _is_distribution(value) -> bool:
    return isinstance(value, dict) and len(value) == 1 and next(iter(value)) in DISTRIBUTIONS


def _flatten_table(table: str, mapping: dict, prefix: str = "") -> dict:
    """Dotted keys -> leaves; TOML dotted keys arrive as nested tables."""
    out = {}
    for key, value in mapping.items():
        dotted = f"{prefix}{key}"
        if isinstance(value, dict) and not _is_distribution(value) and \
                dotted not in cfg.all_keys():
            if not value:
                raise InvalidInputError(f"sweep [{table}]: '{dotted}' is an empty table; give "
                                        "a dotted key such as training.steps")
            out.update(_flatten_table(table, value, dotted + "."))
        else:
            out[dotted] = value
    return out


def _number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _check_distribution(key: str, spec) -> tuple:
    if not _is_distribution(spec):
        raise InvalidInputError(
            f"sweep [random]: '{key}' must be one distribution table such as "
            f"{{choice = [...]}}, {{uniform = [lo, hi]}}, {{log_uniform = [lo, hi]}} or "
            f"{{int = [lo, hi]}}, got {spec!r}")
    kind, args = next(iter(spec.items()))
    if kind == "choice":
        if not isinstance(args, list) or not args:
            raise InvalidInputError(f"sweep [random]: '{key}' choice needs a non-empty list of "
                                    f"values, got {args!r}")
        return kind, list(args)
    if not (isinstance(args, list) and len(args) == 2 and all(map(_number, args))):
        raise InvalidInputError(f"sweep [random]: '{key}' {kind} needs [low, high] (two finite "
                                f"numbers), got {args!r}")
    lo, hi = args
    if kind == "int":
        if not all(isinstance(v, int) for v in args) or lo > hi:
            raise InvalidInputError(f"sweep [random]: '{key}' int needs two integers "
                                    f"low <= high (both included), got {args!r}")
    elif not lo < hi:
        raise InvalidInputError(f"sweep [random]: '{key}' {kind} needs low < high, got {args!r}")
    if kind == "log_uniform" and not lo > 0:
        raise InvalidInputError(f"sweep [random]: '{key}' log_uniform needs 0 < low < high, "
                                f"got {args!r}")
    return kind, [lo, hi]


def _draw(rng: np.random.Generator, kind: str, args: list):
    if kind == "choice":
        return args[int(rng.integers(len(args)))]
    if kind == "int":
        return int(rng.integers(args[0], args[1] + 1))
    if kind == "uniform":
        return float(rng.uniform(args[0], args[1]))
    return float(math.exp(rng.uniform(math.log(args[0]), math.log(args[1]))))


def _canonical(obj) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True)


def config_id(config: dict) -> str:
    """Stable trial id: the first 12 hex digits of the SHA-256 of the resolved config."""
    return hashlib.sha256(_canonical(config).encode()).hexdigest()[:12]


def _describe(assignments) -> str:
    return ", ".join(f"{k}={v!r}" for k, v in assignments) or "base config"


def plan_sweep(description: dict, *, max_trials=None) -> SweepPlan:
    """Validate a sweep description and resolve every trial's configuration.

    Args:
      description: the dict read from a sweep TOML (tables sweep, base, grid, random).
      max_trials: refuse a sweep of more trials (counted before any is built); None:
        ``DEFAULT_MAX_TRIALS``.

    Returns:
      a SweepPlan; nothing is written and nothing runs.

    Raises:
      InvalidInputError: unknown table or key (with the closest valid key), an empty grid,
        a malformed distribution, or a value that makes some trial's config invalid (the
        message names that trial and its swept values).
    """
    if not isinstance(description, dict):
        raise InvalidInputError("a sweep description must be a TOML table with [base] and "
                                "[grid] and/or [random]")
    for table, value in description.items():
        if table not in TABLES:
            close = difflib.get_close_matches(table, TABLES, n=1)
            hint = f"; did you mean [{close[0]}]?" if close else ""
            raise InvalidInputError(f"unknown sweep table [{table}]{hint}; a sweep has "
                                    "[sweep], [base], [grid] and [random]")
        if not isinstance(value, dict):
            raise InvalidInputError(f"sweep [{table}] must be a table, got {value!r}")

    options = dict(description.get("sweep", {}))
    for key, value in options.items():
        if key not in SWEEP_OPTIONS:
            close = difflib.get_close_matches(key, SWEEP_OPTIONS, n=1)
            hint = f"; did you mean '{close[0]}'?" if close else ""
            raise InvalidInputError(f"unknown [sweep] option '{key}'{hint}; options are "
                                    f"{', '.join(SWEEP_OPTIONS)}")
        if not isinstance(value, SWEEP_OPTIONS[key]) or (SWEEP_OPTIONS[key] is str and not value):
            raise InvalidInputError(f"[sweep] {key} must be a non-empty "
                                    f"{SWEEP_OPTIONS[key].__name__}, got {value!r}")
    name = options.get("name", "sweep")
    metric = options.get("metric", DEFAULT_METRIC)
    higher = options.get("higher_is_better", True)

    try:
        base = cfg.resolve_config(description.get("base", {}))
    except InvalidInputError as exc:
        raise InvalidInputError(f"sweep [base]: {exc}") from None

    if "grid" not in description and "random" not in description:
        raise InvalidInputError("the sweep varies nothing: add a [grid] (dotted key -> list of "
                                "values) or a [random] table")
    grid = _flatten_table("grid", description.get("grid", {}))
    if "grid" in description and not grid:
        raise InvalidInputError("sweep [grid] is empty; add dotted keys with lists of values, "
                                "e.g. \"encoding.qubits\" = [2, 3]")
    for key, values in grid.items():
        _check_key("grid", key)
        if not isinstance(values, list):
            raise InvalidInputError(f"sweep [grid]: '{key}' must be a list of values, got "
                                    f"{values!r}; write [{values!r}] or move it to [base]")
        if not values:
            raise InvalidInputError(f"sweep [grid]: '{key}' has an empty list; give at least "
                                    "one value")

    random_table = dict(description.get("random", {}))
    count, draw_seed, dists = 0, 0, {}
    if "random" in description:
        count = random_table.pop("count", None)
        if not isinstance(count, int) or isinstance(count, bool) or count < 1:
            raise InvalidInputError(f"sweep [random] needs count = a positive integer (the "
                                    f"number of draws), got {count!r}")
        if not isinstance(random_table.get("seed", 0), dict):
            draw_seed = random_table.pop("seed", 0)
            if not isinstance(draw_seed, int) or isinstance(draw_seed, bool) or draw_seed < 0:
                raise InvalidInputError(f"sweep [random] seed must be a non-negative integer, "
                                        f"got {draw_seed!r}")
        for key, spec in _flatten_table("random", random_table).items():
            _check_key("random", key)
            dists[key] = _check_distribution(key, spec)
        if not dists:
            raise InvalidInputError("sweep [random] names no keys to draw; add e.g. "
                                    "\"training.learning_rate\" = {log_uniform = [0.01, 0.1]}")
        both = sorted(set(grid) & set(dists))
        if both:
            raise InvalidInputError(f"sweep keys {both} are in both [grid] and [random]; "
                                    "keep each key in one of them")

    limit = DEFAULT_MAX_TRIALS if max_trials is None else max_trials
    n_points = math.prod(len(values) for values in grid.values())
    n_trials = n_points * max(count, 1)
    if n_trials > limit:
        parts = ([f"{n_points} grid points"] if grid else []) + (
            [f"{count} random draws"] if count else [])
        raise InvalidInputError(f"the sweep has {n_trials} trials ({' x '.join(parts)}), more "
                                f"than the limit of {limit}; shrink [grid] or [random] count, "
                                f"or raise the limit with --max-trials {n_trials}")
    grid_points = [tuple(zip(grid, values)) for values in itertools.product(*grid.values())]
    rng = np.random.default_rng(draw_seed)
    draws = [tuple((key, _draw(rng, *spec)) for key, spec in dists.items())
             for _ in range(count)] or [()]
    combos = [point + draw for point in grid_points for draw in draws]

    trials, seen = [], set()
    for number, assignments in enumerate(combos, start=1):
        try:
            config = cfg.resolve_config(description.get("base", {}), assignments)
        except InvalidInputError as exc:
            raise InvalidInputError(f"sweep trial {number} of {len(combos)} "
                                    f"({_describe(assignments)}) is invalid: {exc}") from None
        trial_id = config_id(config)
        if trial_id in seen:  # e.g. two random draws picked the same choices
            continue
        seen.add(trial_id)
        trials.append(Trial(trial_id, len(trials), assignments, config))

    normalized = {"base": base, "grid": grid,
                  "random": ({"count": count, "seed": draw_seed,
                              "keys": {k: {kind: args} for k, (kind, args) in dists.items()}}
                             if dists else {})}
    # [sweep] options are left out on purpose: renaming or re-sorting a sweep is not a new
    # sweep, and its finished trials stay valid.
    digest = hashlib.sha256(_canonical(normalized).encode()).hexdigest()
    return SweepPlan(name, metric, higher, tuple(grid) + tuple(dists), tuple(trials), digest,
                     normalized)


# --------------------------------------------------------------------------- results table

def flatten_summary(summary: dict, prefix: str = "") -> dict:
    """Nested summary -> {dotted key: scalar}; lists and other non-scalars are left out."""
    out = {}
    for key, value in summary.items():
        dotted = f"{prefix}{key}"
        if isinstance(value, dict):
            out.update(flatten_summary(value, dotted + "."))
        elif isinstance(value, np.generic):
            out[dotted] = value.item()
        elif value is None or isinstance(value, (bool, int, float, str)):
            out[dotted] = value
    return out


def _cell(value):
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, (list, dict)):
        return json.dumps(value)
    return value


def _parse_cell(text: str):
    if text == "":
        return None
    if text in ("true", "false"):
        return text == "true"
    for kind in (int, float):
        try:
            return kind(text)
        except ValueError:
            pass
    if text[:1] in "[{":
        try:
            return json.loads(text)
        except json.JSONDecodeError:
            pass
    return text


def _columns(plan: SweepPlan, rows: list) -> list:
    columns = list(FIXED_COLUMNS) + list(plan.swept_keys)
    for row in rows:
        for key in row:
            if key not in columns:
                columns.append(key)
    return columns


def _write_results(out_dir: Path, plan: SweepPlan, rows_by_id: dict) -> list:
    rows = [rows_by_id[t.trial_id] for t in plan.trials if t.trial_id in rows_by_id]
    ranked = [r for r in sort_rows(rows, plan.metric, plan.higher_is_better)
              if r.get("status") == "ok" and _number(r.get(plan.metric))]
    place = {id(r): n for n, r in enumerate(ranked, start=1)}
    for row in rows:
        row["rank"], row["ranked_by"] = place.get(id(row)), plan.metric
    columns = _columns(plan, rows)
    rows = [{k: row.get(k) for k in columns} for row in rows]  # every row has every column
    artifacts.write_csv_rows(out_dir / "results.csv",
                             [{k: _cell(v) for k, v in row.items()} for row in rows], columns)
    return rows


def read_results(out_dir) -> list:
    """Rows of a sweep's ``results.csv`` with numbers, booleans and lists parsed back.

    Raises:
      ArtifactError when the file is not a table this module wrote (binary garbage, a
      ragged row, no trial_id/status columns); ``run_sweep`` then rebuilds it from the
      trial directories.
    """
    import csv

    path = Path(out_dir) / "results.csv"
    if not path.is_file():
        return []
    try:
        with open(path, newline="", encoding="utf-8") as handle:
            reader = csv.DictReader(handle)
            rows = list(reader)
            columns = reader.fieldnames or []
    except (UnicodeDecodeError, csv.Error) as exc:
        raise ArtifactError(f"results.csv in {str(out_dir)!r} is damaged ({exc})") from None
    if "trial_id" not in columns or "status" not in columns:
        raise ArtifactError(f"results.csv in {str(out_dir)!r} is damaged (no trial_id and "
                            "status columns)")
    for number, row in enumerate(rows, start=2):
        if None in row or any(v is None for v in row.values()):
            raise ArtifactError(f"results.csv in {str(out_dir)!r} is damaged (line {number} "
                                f"does not have the header's {len(columns)} cells)")
    return [{k: (v if k in ("trial_id", "status", "error", "ranked_by") else _parse_cell(v))
             for k, v in row.items()} for row in rows]


def _trial_problem(trial_dir: Path, *, writes_manifest: bool):
    """Why a trial recorded as finished cannot be skipped, or None."""
    if not trial_dir.is_dir():
        return "its run directory is missing"
    if (trial_dir / artifacts.MANIFEST).is_file() or writes_manifest:
        try:
            artifacts.verify_run(trial_dir)
        except ArtifactError as exc:
            return " ".join(str(exc).split())
    return None


def _rows_from_trials(out_dir: Path, plan: SweepPlan) -> dict:
    """Rows of the trials whose run directories verify (summary.json read back)."""
    rows = {}
    for trial in plan.trials:
        trial_dir = out_dir / "trials" / trial.trial_id
        if _trial_problem(trial_dir, writes_manifest=True) is not None:
            continue
        try:
            summary = artifacts.read_json(trial_dir / "summary.json")
        except ArtifactError:
            continue
        if isinstance(summary, dict):
            rows[trial.trial_id] = _make_row(trial, {
                "status": "ok", "error": "", "seconds": float(summary.get("wall_time_s") or 0),
                "metrics": flatten_summary(summary)})
    return rows


def _make_row(trial: Trial, outcome: dict) -> dict:
    row = {"trial_id": trial.trial_id, "status": outcome["status"], "error": outcome["error"],
           "seconds": round(outcome["seconds"], 3)}
    row.update(dict(trial.assignments))
    for key, value in outcome.get("metrics", {}).items():
        row.setdefault(key, None if value == "" else value)  # as results.csv reads back
    return row


# --------------------------------------------------------------------------- one trial (worker)

def _claim_cpus(per_trial: int) -> tuple:
    """Lock ``per_trial`` free CPUs (lock files shared by every sweep on this machine).

    Returns (cpus, open lock handles); no CPUs where locking or pinning is unsupported.
    """
    try:
        import fcntl
    except ImportError:
        return (), []
    if not hasattr(os, "sched_setaffinity"):
        return (), []
    allowed = os.environ.get(_ALLOWED_CPUS_VAR)
    if allowed is None:  # remember the process's CPUs before the first pinning shrinks them
        allowed = ",".join(map(str, sorted(os.sched_getaffinity(0))))
        os.environ[_ALLOWED_CPUS_VAR] = allowed
    lock_dir = Path(tempfile.gettempdir()) / _CPU_LOCK_DIR
    lock_dir.mkdir(exist_ok=True)
    cpus, handles = [], []
    for cpu in map(int, allowed.split(",")):
        handle = open(lock_dir / f"cpu-{cpu}.lock", "a")
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            handle.close()
            continue
        cpus.append(cpu)
        handles.append(handle)
        if len(cpus) == per_trial:
            break
    return tuple(cpus), handles


def _pin_process(cpus) -> None:
    """Confine every thread of this process to ``cpus`` (threads started later inherit)."""
    for tid in os.listdir("/proc/self/task") if os.path.isdir("/proc/self/task") else ["0"]:
        try:
            os.sched_setaffinity(int(tid), set(cpus))
        except OSError:  # the thread ended meanwhile
            pass


def _prepare_worker(per_trial: int) -> tuple:
    """Keep one trial on its own CPUs so parallel trials do not oversubscribe the machine.

    Sets the XLA flag (before JAX creates its CPU backend: importing jax does not create
    it), one thread for OpenMP/BLAS, and pins the process to CPUs claimed for this trial;
    XLA sizes its thread pool from the CPUs the process may use.
    """
    flags = os.environ.get("XLA_FLAGS", "")
    if "xla_cpu_multi_thread_eigen" not in flags:
        os.environ["XLA_FLAGS"] = f"{flags} {WORKER_XLA_FLAG}".strip()
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[var] = str(per_trial)
    cpus, handles = _claim_cpus(per_trial)
    if cpus:
        _pin_process(cpus)
    return cpus, handles


def _default_trial_fn():
    from hilbertune.runs import execute_fit

    return execute_fit


def execute_trial(trial_fn, trial_id: str, config: dict, trial_dir: str, *,
                  cpus_per_trial: int = 0) -> dict:
    """Run one trial and never raise: the outcome says ok or failed (with the error).

    Args:
      trial_fn: ``f(config, out_dir, *, overwrite, progress) -> summary dict``; None for
        ``runs.execute_fit``.
      cpus_per_trial: 0 runs in the calling process as it is; n > 0 (worker processes
        only) pins this process to n CPUs claimed for the trial.

    Returns:
      dict with trial_id, status ("ok"/"failed"), error (one line), traceback, seconds,
      metrics (the flattened summary).
    """
    started = time.perf_counter()
    handles = []
    try:
        if cpus_per_trial:
            _, handles = _prepare_worker(cpus_per_trial)
        fn = trial_fn if trial_fn is not None else _default_trial_fn()
        summary = fn(config, trial_dir, overwrite=True, progress=False)
        if not isinstance(summary, dict):
            raise TypeError(f"the trial function returned {type(summary).__name__}, not the "
                            "summary dict")
        return {"trial_id": trial_id, "status": "ok", "error": "", "traceback": "",
                "seconds": time.perf_counter() - started, "metrics": flatten_summary(summary)}
    except Exception as exc:  # noqa: BLE001 - a failed trial is recorded, the sweep goes on
        message = " ".join(f"{type(exc).__name__}: {exc}".split())
        return {"trial_id": trial_id, "status": "failed", "error": message,
                "traceback": traceback.format_exc(), "seconds": time.perf_counter() - started,
                "metrics": {}}
    finally:
        for handle in handles:
            handle.close()  # releases the CPU locks


# --------------------------------------------------------------------------- schedulers

def _check_address(scheduler: str, timeout: float) -> str:
    parsed = urlparse(scheduler)
    try:
        port = parsed.port
    except ValueError:
        port = None
    if parsed.scheme != "tcp" or not parsed.hostname or port is None or parsed.path:
        raise InvalidInputError(f"scheduler {scheduler!r} not understood; pass 'local' or a "
                                "Dask scheduler address such as tcp://127.0.0.1:8786")
    try:
        with socket.create_connection((parsed.hostname, port), timeout=timeout):
            pass
    except OSError as exc:
        reason = exc.strerror or type(exc).__name__
        raise InvalidInputError(
            f"cannot reach the Dask scheduler at {scheduler} ({reason}); start one with "
            f"`dask scheduler --port {port}` and workers with `dask worker {scheduler}`, or "
            "pass --scheduler local") from None
    return scheduler


class _DaskRunner(NamedTuple):
    client: object
    cluster: object      # None for a remote scheduler
    isolate: bool        # our own single-threaded worker processes: pin each trial


def _open_dask(workers: int, scheduler: str, processes: bool, timeout: float) -> _DaskRunner:
    from dask.distributed import Client, LocalCluster

    if scheduler == "local":
        # loopback only, no dashboard; ERROR-level logs hide the nanny's harmless "still
        # alive after 4 s, killing" warnings when JAX workers are shut down
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=processes,
                               host="127.0.0.1", dashboard_address=None, scheduler_port=0,
                               silence_logs=logging.ERROR)
        return _DaskRunner(Client(cluster), cluster, processes)
    address = _check_address(scheduler, timeout)
    try:
        client = Client(address, timeout=f"{timeout}s")
    except (OSError, TimeoutError) as exc:
        raise InvalidInputError(f"cannot connect to the Dask scheduler at {address} within "
                                f"{timeout:g} s ({exc}); check the address and that it is a "
                                "Dask scheduler") from None
    try:
        client.wait_for_workers(1, timeout=timeout)
    except (OSError, TimeoutError):
        client.close()
        raise InvalidInputError(f"the Dask scheduler at {address} has no workers; start some "
                                f"with `dask worker {address}`") from None
    return _DaskRunner(client, None, False)


def _close_dask(runner: _DaskRunner) -> None:
    runner.client.close()
    if runner.cluster is not None:
        runner.cluster.close()


def _cpus_per_trial(workers: int) -> int:
    available = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (
        os.cpu_count() or 1)
    return max(1, available // workers)


def _run_joblib(pending, trial_fn, out_dir: Path, workers: int):
    from concurrent.futures.process import BrokenProcessPool

    from joblib import Parallel, delayed, parallel_config
    from joblib.externals.loky.process_executor import TerminatedWorkerError

    per = _cpus_per_trial(workers)
    calls = (delayed(execute_trial)(trial_fn, t.trial_id, t.config,
                                    str(out_dir / "trials" / t.trial_id), cpus_per_trial=per)
             for t in pending)
    unfinished = {t.trial_id for t in pending}
    try:
        with parallel_config(backend="loky", inner_max_num_threads=per):
            for outcome in Parallel(n_jobs=workers, return_as="generator_unordered")(calls):
                unfinished.discard(outcome["trial_id"])
                yield outcome
    except (TerminatedWorkerError, BrokenProcessPool) as exc:  # e.g. killed: out of memory
        message = (f"worker process died before this trial finished ({type(exc).__name__}); "
                   "rerun the sweep to retry it")
        for trial_id in sorted(unfinished):
            yield {"trial_id": trial_id, "status": "failed", "error": message,
                   "traceback": "".join(traceback.format_exception(exc)), "seconds": 0.0,
                   "metrics": {}}


def _run_dask(pending, trial_fn, out_dir: Path, runner: _DaskRunner):
    from dask.distributed import as_completed

    # Pin only the worker processes we started (one thread each); a remote cluster's
    # workers are the user's to configure and may run several trials per process.
    n_workers = max(1, len(runner.client.scheduler_info().get("workers", {})))
    per = _cpus_per_trial(n_workers) if runner.isolate else 0
    futures, trial_of = [], {}
    for t in pending:
        future = runner.client.submit(execute_trial, trial_fn, t.trial_id, t.config,
                                      str(out_dir / "trials" / t.trial_id), cpus_per_trial=per,
                                      pure=False,
                                      key=f"hilbertune-trial-{t.trial_id}-{os.urandom(4).hex()}")
        futures.append(future)
        trial_of[future.key] = t.trial_id
    for future in as_completed(futures):
        try:
            yield future.result()
        except Exception as exc:  # noqa: BLE001 - e.g. KilledWorker: recorded, sweep goes on
            yield {"trial_id": trial_of[future.key], "status": "failed",
                   "error": " ".join(f"{type(exc).__name__}: {exc}".split()),
                   "traceback": "".join(traceback.format_exception(exc)), "seconds": 0.0,
                   "metrics": {}}


# --------------------------------------------------------------------------- the sweep

def _check_out_dir(out_dir: Path, plan: SweepPlan) -> None:
    """Refuse a directory holding another sweep's results; read-only."""
    if out_dir.exists() and not out_dir.is_dir():
        raise InvalidInputError(f"sweep output {str(out_dir)!r} is a file; choose a directory")
    record = out_dir / "sweep.json"
    if record.is_file():
        try:
            saved = artifacts.read_json(record)
        except ArtifactError as exc:
            raise InvalidInputError(f"{exc}; choose another --out for this sweep") from None
        if saved.get("description_hash") != plan.description_hash:
            raise InvalidInputError(
                f"{str(out_dir)!r} holds the results of a different sweep "
                f"({saved.get('name', '?')!r}, description hash "
                f"{str(saved.get('description_hash'))[:12]}); nothing was overwritten: choose "
                "another --out directory for this sweep")
    elif (out_dir / "results.csv").exists() or (out_dir / "trials").exists():
        raise InvalidInputError(f"{str(out_dir)!r} holds results.csv or trials/ without "
                                "sweep.json, so they may belong to another sweep; nothing was "
                                "overwritten: choose another --out directory")


def _sweep_record(plan: SweepPlan) -> dict:
    return {"format_version": SWEEP_FORMAT_VERSION, "tool": "hilbertune", "name": plan.name,
            "metric": plan.metric, "higher_is_better": plan.higher_is_better,
            "description_hash": plan.description_hash, "description": plan.normalized,
            "swept_keys": list(plan.swept_keys),
            "trials": [{"trial_id": t.trial_id, "assignments": dict(t.assignments)}
                       for t in plan.trials]}


def run_sweep(description: dict, out_dir, *, workers: int = 1, scheduler: str | None = None,
              trial_fn=None, progress: bool = False, processes: bool = True,
              connect_timeout: float = 10.0, max_trials=None) -> list:
    """Run every trial of a sweep; write results.csv, sweep.json and sweep_report.html.

    Args:
      description: the sweep description (see the module docstring).
      out_dir: sweep directory. Rerunning into the same directory skips the trials already
        finished OK whose run directories still verify against their manifests (resume;
        a missing or damaged one runs again); a directory holding a different sweep is
        refused, and so is one another sweep is writing. A damaged results.csv is rebuilt
        from the trial directories.
      workers: parallel trials. With ``scheduler=None`` and ``workers > 1`` trials run in
        joblib worker processes, each pinned to its share of the CPUs.
      scheduler: None (local), ``"local"`` (a Dask LocalCluster on 127.0.0.1 with
        ``workers`` workers) or a Dask scheduler address ``"tcp://host:port"`` (workers must
        see ``out_dir`` on a shared file system).
      trial_fn: ``f(config, out_dir, *, overwrite, progress) -> summary dict``; default
        ``runs.execute_fit``. Must be picklable for process workers.
      progress: print one line per finished trial to stderr.
      processes: for ``scheduler="local"``: worker processes (True) or threads (False).
      connect_timeout: seconds to reach a scheduler before giving up.
      max_trials: refuse sweeps of more trials (None: ``DEFAULT_MAX_TRIALS``).

    Returns:
      the results table as a list of row dicts, in trial order: trial_id, status ("ok" or
      "failed"), error, seconds, every swept key, every flattened summary metric.
    """
    plan = plan_sweep(description, max_trials=max_trials)
    if not isinstance(workers, int) or isinstance(workers, bool) or workers < 1:
        raise InvalidInputError(f"workers must be a positive integer, got {workers!r}")
    out_dir = Path(out_dir).resolve()
    _check_out_dir(out_dir, plan)
    from hilbertune import rundir

    with rundir.exclusive(out_dir, what="sweep directory"):
        return _run_locked(plan, out_dir, workers=workers, scheduler=scheduler,
                           trial_fn=trial_fn, progress=progress, processes=processes,
                           connect_timeout=connect_timeout)


def _say(progress: bool, text: str) -> None:
    if progress:
        print(text, file=sys.stderr)


def _run_locked(plan: SweepPlan, out_dir: Path, *, workers, scheduler, trial_fn, progress,
                processes, connect_timeout) -> list:
    try:
        previous = {row["trial_id"]: row for row in read_results(out_dir)}
    except ArtifactError as exc:
        previous = _rows_from_trials(out_dir, plan)
        _say(progress, f"sweep: {exc}; rebuilt it from {len(previous)} verified trial "
                       "director(y/ies), the other trials run again")
    known = {t.trial_id for t in plan.trials}
    rows_by_id = {}
    for trial in plan.trials:  # finished OK before and still intact: keep the row, skip it
        row = previous.get(trial.trial_id)
        if row is None or row.get("status") != "ok":
            continue
        problem = _trial_problem(out_dir / "trials" / trial.trial_id,
                                 writes_manifest=trial_fn is None)
        if problem is not None:
            _say(progress, f"sweep: trial {trial.trial_id} was recorded as finished but "
                           f"{problem}; running it again")
            continue
        row.update(dict(trial.assignments))  # typed values, not their CSV text
        rows_by_id[trial.trial_id] = row
    rows_by_id.update({k: v for k, v in previous.items()
                       if k in known and k not in rows_by_id
                       and v.get("status") != "ok"})  # failed before: shown until rerun
    pending = [t for t in plan.trials if rows_by_id.get(t.trial_id, {}).get("status") != "ok"]

    # reach the scheduler (or start the local cluster) before writing anything
    runner = _open_dask(workers, scheduler, processes, connect_timeout) if scheduler else None
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
        artifacts.write_json(out_dir / "sweep.json", _sweep_record(plan))
        total, skipped = len(plan.trials), len(plan.trials) - len(pending)
        _say(progress, f"sweep {plan.name!r}: {total} trials, {skipped} already finished "
                       f"and verified (skipped), {len(pending)} to run")
        if runner is not None:
            outcomes = _run_dask(pending, trial_fn, out_dir, runner)
        elif workers > 1 and len(pending) > 1:
            outcomes = _run_joblib(pending, trial_fn, out_dir, workers)
        else:
            outcomes = (execute_trial(trial_fn, t.trial_id, t.config,
                                      str(out_dir / "trials" / t.trial_id)) for t in pending)
        by_id = {t.trial_id: t for t in plan.trials}
        done = skipped
        for outcome in outcomes:
            trial = by_id[outcome["trial_id"]]
            rows_by_id[trial.trial_id] = _make_row(trial, outcome)
            if outcome["status"] == "failed":
                artifacts.write_text(out_dir / "errors" / f"{trial.trial_id}.txt",
                                     f"{_describe(trial.assignments)}\n\n{outcome['traceback']}")
            _write_results(out_dir, plan, rows_by_id)
            done += 1
            if progress:
                value = outcome["metrics"].get(plan.metric)
                shown = f"{plan.metric}={value:.4g}" if _number(value) else outcome["error"]
                print(f"[{done}/{total}] {trial.trial_id} {outcome['status']} {shown} "
                      f"({outcome['seconds']:.1f} s; {_describe(trial.assignments)})",
                      file=sys.stderr)
    finally:
        if runner is not None:
            _close_dask(runner)
    rows = _write_results(out_dir, plan, rows_by_id)
    artifacts.write_text(out_dir / "sweep_report.html", sweep_report_html(plan, rows))
    return rows


def run_sweep_file(path, out_dir, **options) -> list:
    """``run_sweep`` on a sweep TOML file (what ``hilbertune sweep FILE`` does)."""
    return run_sweep(cfg.load_toml(path), out_dir, **options)


# --------------------------------------------------------------------------- report

def sort_rows(rows: list, metric: str, higher_is_better: bool = True) -> list:
    """OK trials by the metric (best first; missing values last), then failed trials."""
    def key(row):
        value = row.get(metric)
        ok = row.get("status") == "ok" and _number(value)
        return (0 if ok else 1 if row.get("status") == "ok" else 2,
                (-value if higher_is_better else value) if ok else 0.0)
    return sorted(rows, key=key)


def _figure_png(fig) -> str:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110, bbox_inches="tight")
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def _baseline_means(rows: list) -> list:
    lines = []
    for key, label, style in BASELINE_LINES:
        values = [r[key] for r in rows if r.get("status") == "ok" and _number(r.get(key))]
        if values:
            lines.append((label, float(np.mean(values)), style))
    return lines


def _metric_plot(plan: SweepPlan, rows: list, key: str) -> str:
    from matplotlib.figure import Figure

    ok = [r for r in rows if r.get("status") == "ok" and _number(r.get(plan.metric))]
    xs = [r.get(key) for r in ok]
    ys = [r[plan.metric] for r in ok]
    fig = Figure(figsize=(5.2, 3.4))
    ax = fig.add_subplot()
    numeric = all(_number(x) for x in xs)
    if numeric:
        ax.scatter(xs, ys, s=22, alpha=0.75, label="trials")
        levels = sorted(set(xs))
        if len(levels) < len(xs):  # repeated values (a grid): the mean per value
            ax.plot(levels, [np.mean([y for x, y in zip(xs, ys) if x == v]) for v in levels],
                    "-", color="C0", lw=1.2, label="mean per value")
        if levels and min(levels) > 0 and max(levels) / min(levels) >= 30:
            ax.set_xscale("log")
        elif all(isinstance(x, int) for x in xs):
            ax.set_xticks(levels)
    else:
        labels = list(dict.fromkeys(json.dumps(x) if isinstance(x, list) else str(x) for x in xs))
        pos = [labels.index(json.dumps(x) if isinstance(x, list) else str(x)) for x in xs]
        ax.scatter(pos, ys, s=22, alpha=0.75, label="trials")
        ax.set_xticks(range(len(labels)), labels, rotation=20)
    if plan.metric in TEST_SPLIT_METRICS:  # baselines are test accuracies: same axis only then
        for label, value, style in _baseline_means(rows):
            ax.axhline(value, ls=style, color="0.3", lw=1.1, label=f"{label} (mean {value:.3f})")
    ax.set_xlabel(key)
    ax.set_ylabel(plan.metric)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="best")
    return _figure_png(fig)


def _ranking_label(plan: SweepPlan, metric: str) -> str:
    if metric in TEST_SPLIT_METRICS and metric != plan.metric:
        return "<br><small>(test split, not used for ranking)</small>"
    return ""


def _fmt(value) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    if value is None:
        return ""
    return str(value)


def sweep_report_html(plan: SweepPlan, rows: list) -> str:
    """Self-contained HTML: best trial, table sorted by the metric, metric vs each key."""
    esc = html.escape
    ordered = sort_rows(rows, plan.metric, plan.higher_is_better)
    ok = [r for r in rows if r.get("status") == "ok"]
    failed = [r for r in rows if r.get("status") != "ok"]
    shown = [m for m in dict.fromkeys((plan.metric,) + REPORT_METRICS)
             if any(m in r for r in rows)]
    parts = [
        "<!DOCTYPE html><html><head><meta charset='utf-8'>",
        f"<title>hilbertune sweep {esc(plan.name)}</title><style>",
        "body{font-family:system-ui,sans-serif;margin:2em;max-width:1200px}"
        "table{border-collapse:collapse;font-size:13px}td,th{border:1px solid #ccc;"
        "padding:3px 7px;text-align:right}th{background:#f2f2f2}td.l{text-align:left}"
        "tr.failed td{color:#a00}.note{color:#555}img{margin:6px}",
        "</style></head><body>",
        f"<h1>Sweep: {esc(plan.name)}</h1>",
        f"<p>{len(rows)} of {len(plan.trials)} trials finished: {len(ok)} ok, "
        f"{len(failed)} failed. Sorted by <b>{esc(plan.metric)}</b> "
        f"({'higher' if plan.higher_is_better else 'lower'} is better). Description hash "
        f"<code>{esc(plan.description_hash[:12])}</code>.</p>",
        ("<p class='note'><b>Caution:</b> this sweep ranks trials by a test-split metric, "
         "which selects on the test rows; the best trial's score is then biased upward. "
         f"Rank by {esc(DEFAULT_METRIC)} (inner cross-validation on the training part) "
         "instead.</p>" if plan.metric in TEST_SPLIT_METRICS else
         "<p class='note'>Columns marked <i>not used for ranking</i> are measured on each "
         "trial's test rows; they are shown, never used to pick a trial.</p>"),
        "<p class='note'>All quantum kernels were simulated exactly on a classical computer; "
        "a simulated kernel is no evidence about quantum hardware. The best of many trials "
        "is an optimistic estimate: confirm it on fresh splits before trusting it.</p>",
    ]
    baselines = _baseline_means(rows)
    if baselines:
        parts.append("<p>Classical baselines (mean over OK trials, same splits as each trial): "
                     + "; ".join(f"{esc(label)} {value:.4f}" for label, value, _ in baselines)
                     + "</p>")
    parts.append("<h2>Trials</h2><table><tr><th>#</th><th>trial</th><th>status</th>"
                 + "".join(f"<th>{esc(k)}</th>" for k in plan.swept_keys)
                 + "".join(f"<th>{esc(m)}{_ranking_label(plan, m)}</th>" for m in shown)
                 + "<th>seconds</th><th>error</th></tr>")
    for rank, row in enumerate(ordered, start=1):
        tid = esc(str(row["trial_id"]))
        parts.append(
            f"<tr class='{'ok' if row.get('status') == 'ok' else 'failed'}'><td>{rank}</td>"
            + (f"<td class='l'><a href='trials/{tid}/report.html'>{tid}</a></td>"
               if row.get("status") == "ok" else f"<td class='l'>{tid}</td>")
            + f"<td class='l'>{esc(str(row.get('status')))}</td>"
            + "".join(f"<td>{esc(_fmt(row.get(k)))}</td>" for k in plan.swept_keys)
            + "".join(f"<td>{esc(_fmt(row.get(m)))}</td>" for m in shown)
            + f"<td>{esc(_fmt(row.get('seconds')))}</td>"
            f"<td class='l'>{esc(str(row.get('error') or ''))}</td></tr>")
    parts.append("</table>")
    if any(_number(r.get(plan.metric)) for r in ok):
        parts.append(f"<h2>{esc(plan.metric)} against each swept key</h2>")
        if plan.metric in TEST_SPLIT_METRICS and baselines:
            parts.append("<p class='note'>Horizontal lines: classical baselines (mean over "
                         "trials).</p>")
        for key in plan.swept_keys:
            parts.append(f"<img alt='{esc(plan.metric)} against {esc(key)}' "
                         f"src='data:image/png;base64,{_metric_plot(plan, rows, key)}'>")
    elif ok:
        parts.append(f"<p>No trial reported the metric {esc(plan.metric)!s}; pick another "
                     "[sweep] metric (a column of results.csv).</p>")
    parts.append("</body></html>\n")
    return "\n".join(parts)


def render_sweep_report(out_dir) -> str:
    """Rebuild ``sweep_report.html`` from ``sweep.json`` and ``results.csv`` alone."""
    out_dir = Path(out_dir)
    record = artifacts.read_json(out_dir / "sweep.json")
    description = {"base": _unflatten(record["description"]["base"]),
                   "sweep": {"name": record["name"], "metric": record["metric"],
                             "higher_is_better": record["higher_is_better"]}}
    if record["description"]["grid"]:
        description["grid"] = record["description"]["grid"]
    rand = record["description"]["random"]
    if rand:
        description["random"] = {"count": rand["count"], "seed": rand["seed"], **rand["keys"]}
    plan = plan_sweep(description, max_trials=math.inf)  # it was accepted when it ran
    text = sweep_report_html(plan, read_results(out_dir))
    artifacts.write_text(out_dir / "sweep_report.html", text)
    return text


def _unflatten(config: dict) -> dict:
    return {k: dict(v) if isinstance(v, dict) else v for k, v in config.items()}
