"""The benchmark scripts still run (``--quick``) and their two paths agree.

The speed figures themselves are not asserted (machines are shared and noisy); what is
checked is that each script prints its JSON, that the Gram and the per-pair
compute-uncompute path give the same kernel entries, and that every ratio is a positive
number.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _run(script):
    env = {**os.environ, "MPLBACKEND": "Agg"}
    done = subprocess.run([sys.executable, str(ROOT / "experiments" / script), "--quick"],
                          capture_output=True, text=True, timeout=600, env=env, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    return json.loads(done.stdout)


def test_gram_benchmark_runs_and_its_paths_agree():
    report = _run("bench_gram.py")
    assert report["per_pair"]["max_abs_diff_gram_vs_per_pair"] < 1e-5
    for ratio in (report["layered"]["ratio_total_over_baseline"],
                  report["per_pair"]["speedup"],
                  report["per_pair"]["speedup_vs_one_call_per_pair"],
                  report["product"]["ratio_total_over_rbf"]):
        assert math.isfinite(ratio) and ratio > 0


def test_training_benchmark_runs():
    report = _run("bench_training.py")
    assert report["ratio_optimizer_step_to_forward"] > 0
    assert report["minibatch_steps_per_s"] > 0
    assert set(report["step_parts"]) == {"circuit_forward_s", "circuit_forward_and_reverse_s",
                                         "host_overlap_herk_s", "host_backward_gemm_s"}
