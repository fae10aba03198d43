"""Benchmark: where the time of a whole default fit goes, stage by stage.

Usage: python experiments/bench_fit.py [--quick] [--repeats R] [--out FILE]

Runs the default fit (``hilbertune fit --set data.source=breast_cancer --qubits 6``:
learning and nested selection on the main split and on 4 more splits, baselines,
diagnostics, hardware estimate, artifacts), each in a new process as a user would:
  * cold: with an empty persistent compilation cache (every training step and Gram is
    compiled);
  * warm, workers=2 and workers=1: later fits that load compiled code from the persistent
    cache (``compute.compile_cache``), with the splits run two at a time or one at a time
    (``compute.workers``), interleaved;
  * one_training_s: one training run of the fully learned candidate on the main training
    part, in this process after a compiling warm-up call.
Prints medians per stage (``summary.json``'s ``timings``), the totals, and the ratios
warm/cold, workers 2/1, and total/one training. ``--quick``: tiny demo data (smoke check).
Prints one JSON object; ``--out`` also writes it.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time

SRC = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "src")
sys.path.insert(0, SRC)

from hilbertune import config as cfg  # noqa: E402
from hilbertune import runs  # noqa: E402


def fit_seconds(overrides: list) -> dict:
    """Wall seconds of ``hilbertune fit`` in a new process, and its stage timings."""
    with tempfile.TemporaryDirectory() as folder:
        command = [sys.executable, "-m", "hilbertune.cli", "fit", "--quiet", "--out",
                   os.path.join(folder, "run")]
        for key, value in overrides:
            command += ["--set", f"{key}={json.dumps(value)}"]
        env = {**os.environ, "PYTHONPATH": SRC + os.pathsep + os.environ.get("PYTHONPATH", "")}
        started = time.perf_counter()
        subprocess.run(command, check=True, env=env, stdout=subprocess.DEVNULL)
        total = time.perf_counter() - started
        with open(os.path.join(folder, "run", "summary.json"), encoding="utf-8") as stream:
            timings = json.load(stream)["timings"]
    return {"total": total, **timings}


def medians(samples: list) -> dict:
    keys = sorted(set().union(*samples))
    return {k: statistics.median(s[k] for s in samples if k in s) for k in keys}


def main(argv=None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--out", default="")
    args = parser.parse_args(argv)
    overrides = [("data.source", "breast_cancer"), ("encoding.qubits", 6), ("seed", 1)]
    if args.quick:
        overrides = [("data.source", "demo"), ("data.samples", 60), ("encoding.qubits", 2),
                     ("training.steps", 4), ("evaluation.repeats", 2), ("svm.cv_folds", 2),
                     ("selection.folds", 2), ("hardware.enabled", False)]
    cache = tempfile.mkdtemp(prefix="hilbertune-bench-cache-")
    overrides.append(("compute.compile_cache", cache))
    base = cfg.resolve_config(None, overrides)

    cold = fit_seconds(overrides + [("compute.workers", 2)])
    warm = {1: [], 2: []}
    for _ in range(args.repeats):  # interleaved, so drifts in machine load hit both alike
        for workers in (2, 1):
            warm[workers].append(fit_seconds(overrides + [("compute.workers", workers)]))

    # one training run of the fully learned candidate on the main training part
    from hilbertune import pipeline
    from hilbertune.training import train_encoding

    dataset, n_features, blueprint, split = runs.check_inputs(base)
    settings = pipeline.settings_from_config(base, n_features)
    one = []
    train_encoding(blueprint, split.X_train, split.y_train, settings.training,
                   seed=settings.seed)  # compiles
    for _ in range(args.repeats):
        started = time.perf_counter()
        train_encoding(blueprint, split.X_train, split.y_train, settings.training,
                       seed=settings.seed)
        one.append(time.perf_counter() - started)

    w2, w1 = medians(warm[2]), medians(warm[1])
    result = {
        "problem": "quick demo" if args.quick else "breast_cancer, 6 qubits, default fit",
        "repeats": args.repeats, "cpu_count": os.cpu_count(), "platform": platform.platform(),
        "cold_s": cold, "warm_workers2_s": w2, "warm_workers1_s": w1,
        "one_training_s": statistics.median(one),
        "ratio_warm_to_cold": w2["total"] / cold["total"],
        "ratio_workers2_to_workers1": w2["total"] / w1["total"],
        "ratio_fit_to_one_training": w2["total"] / statistics.median(one),
        "note": "medians over the repeats; each fit is a new `hilbertune fit` process (wall "
                "time includes imports); stage names are summary.json's timings (splits = "
                "every split's learning, selection, evaluation and baselines)",
    }
    text = json.dumps(result, indent=2)
    print(text)
    if args.out:
        with open(args.out, "w", encoding="utf-8") as stream:
            stream.write(text + "\n")
    return result


if __name__ == "__main__":
    main()
