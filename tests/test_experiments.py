"""The benchmark and study scripts still run (``--quick``); the Gram benchmark's paths agree.

The speed figures themselves are not asserted (machines are shared and noisy); what is
checked is that each script prints its JSON, that the Gram and the per-pair
inversion-test path give the same kernel entries, and that every ratio is a positive
number.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]


def _run(script, *extra):
    env = {**os.environ, "MPLBACKEND": "Agg"}
    done = subprocess.run([sys.executable, str(ROOT / "experiments" / script), "--quick",
                           *map(str, extra)],
                          capture_output=True, text=True, timeout=600, env=env, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout


def test_gram_benchmark_runs_and_its_paths_agree():
    report = json.loads(_run("bench_gram.py"))
    assert report["per_pair"]["max_abs_diff_gram_vs_per_pair"] < 1e-5
    for ratio in (report["layered"]["ratio_total_over_baseline"],
                  report["per_pair"]["speedup"],
                  report["per_pair"]["speedup_vs_one_call_per_pair"],
                  report["product"]["ratio_total_over_rbf"]):
        assert math.isfinite(ratio) and ratio > 0


def test_training_benchmark_runs():
    report = json.loads(_run("bench_training.py"))
    assert report["ratio_optimizer_step_to_forward"] > 0
    assert report["minibatch_steps_per_s"] > 0
    assert set(report["step_parts"]) == {
        "circuit_forward_s", "circuit_forward_and_reverse_s", "circuit_forward_unchunked_s",
        "circuit_forward_and_reverse_unchunked_s", "host_overlap_herk_s",
        "backward_three_real_products_s", "reference_host_cgemm_s", "one_real_product_s"}
    # --quick products are too small for their relative cost to mean anything (and a loaded
    # machine moves these timing ratios below 1): only sanity
    assert report["ratio_floor_if_circuit_cost_nothing"] > 0
    assert report["ratio_if_only_products_and_circuit"] > 0
    assert report["backward_in_real_products"] > 0 and report["herk_in_real_products"] > 0


def test_scaling_and_accuracy_studies_run_and_write_their_results(tmp_path):
    _run("scaling_study.py", "--out", tmp_path)
    scaling = json.loads((tmp_path / "scaling.json").read_text())
    assert (tmp_path / "scaling.md").read_text().startswith("# Scaling")
    assert all(row["seconds"] > 0 for row in scaling["by_samples"] + scaling["by_qubits"])
    # Nystroem with fewer landmarks than samples is an approximation: error in (0, 1)
    assert all(0 < row["relative_frobenius_error"] < 1 for row in scaling["nystroem"])
    _run("accuracy_vs_qubits.py", "--out", tmp_path)
    accuracy = json.loads((tmp_path / "accuracy_vs_qubits.json").read_text())
    assert {"quantum_untrained", "quantum_trained", "rbf_svm", "linear_svm"} <= set(accuracy)
    assert (tmp_path / "scaling_vs_samples.png").stat().st_size > 0
    assert (tmp_path / "accuracy_vs_qubits.png").stat().st_size > 0


def test_accuracy_study_runs_resumes_and_replays_the_selection(tmp_path):
    out = _run("accuracy_study.py", "--out", tmp_path)
    raw = json.loads((tmp_path / "accuracy_study.json").read_text())
    assert len(raw["entries"]) == 2 and "Rule (stated after" in out
    for entry in raw["entries"]:
        names = [c["name"] for c in entry["candidates"]]
        assert names[0] == "untrained" and entry["chosen"] in names
        assert all(0 <= c["test_accuracy"] <= 1 for c in entry["candidates"])
    table = (tmp_path / "accuracy_study.md").read_text()
    # the post-hoc replay of the full set reproduces learn_and_select's own choice
    assert "in every run: yes" in table and "(invented)" in table
    assert "says anything about quantum hardware" in table
    assert (tmp_path / "accuracy_study.png").stat().st_size > 0
    again = _run("accuracy_study.py", "--out", tmp_path)  # resume: nothing left to compute
    assert " seed " not in again
    assert json.loads((tmp_path / "accuracy_study.json").read_text())["entries"] == \
        raw["entries"]


def test_fit_benchmark_runs_and_reports_every_stage(tmp_path):
    report = json.loads(_run("bench_fit.py", "--repeats", 1, "--out", tmp_path / "fit.json"))
    assert json.loads((tmp_path / "fit.json").read_text()) == report
    for key in ("cold_s", "warm_workers2_s", "warm_workers1_s"):
        assert {"total", "splits", "diagnostics", "artifacts"} <= set(report[key])
        # the stages are parts of the whole process's wall time
        assert sum(v for k, v in report[key].items() if k in (
            "splits", "diagnostics", "hardware", "artifacts")) < report[key]["total"]
    for ratio in ("ratio_warm_to_cold", "ratio_workers2_to_workers1",
                  "ratio_fit_to_one_training"):
        assert math.isfinite(report[ratio]) and report[ratio] > 0


def _rule_check_module():
    import importlib.util

    spec = importlib.util.spec_from_file_location("rule_check",
                                                  ROOT / "experiments" / "rule_check.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.mark.parametrize("round_, proposed", [(2, "paired"), (3, "one_objective")])
def test_rule_check_runs_and_states_its_decision(tmp_path, round_, proposed):
    out = _run("rule_check.py", "--round", round_, "--out", tmp_path)
    raw = json.loads((tmp_path / f"rule_check_round{round_}.json").read_text())
    assert len(raw["entries"]) == 1 and f"adopt {proposed}:" in out
    table = (tmp_path / f"rule_check_round{round_}.md").read_text()
    assert "## Decision" in table and "says nothing about hardware" in table
    # the replayed one-standard-error choice is the one learn_and_select recorded
    module = _rule_check_module()
    entry = raw["entries"][0]
    assert module.choose(entry["candidates"], "one_standard_error")["name"] == entry["chosen"]


def test_rule_check_round_one_replays_to_its_committed_table(tmp_path):
    # the committed raw results of round 1, replayed by today's rules, give the committed
    # table (a change of a rule's code would show here)
    results = ROOT / "experiments" / "results"
    (tmp_path / "rule_check.json").write_text((results / "rule_check.json").read_text())
    done = subprocess.run([sys.executable, str(ROOT / "experiments" / "rule_check.py"),
                           "--round", "1", "--analyse-only", "--out", str(tmp_path)],
                          capture_output=True, text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "adopt best_or_untrained: False" in done.stdout
    assert (tmp_path / "rule_check.md").read_text() == (results / "rule_check.md").read_text()


def test_readme_pooled_figures_are_those_of_the_committed_results():
    # the README's table of rules over every evaluation is copied by hand: recompute it
    # from the committed raw results so that a rerun or an edit cannot leave it stale
    module = _rule_check_module()
    table = module.pooled(ROOT / "experiments" / "results")
    readme = (ROOT / "README.md").read_text()
    assert f"{len(table)} datasets" in readme
    assert f"{sum(r['seeds'] for r in table.values())} splits in all" in readme
    for rule, label in (("paired", "`paired` (default)"),
                        ("one_standard_error", "`one_standard_error` (default before)"),
                        ("best", "`best` (no guard)")):
        gains = [r[rule] for r in table.values()]
        gaps = [r["rbf_svm"] - r["untrained"] - r[rule] for r in table.values()]
        row = (f"| {label} | {100 * min(gains):+.1f} | {100 * float(np.mean(gains)):+.1f} | "
               f"{sum(g >= 0.01 - 1e-9 for g in gains)} of {len(table)} | "
               f"{sum(g < -0.005 - 1e-9 for g in gains)} | "
               f"{100 * float(np.median(gaps)):.1f} pt |")
        assert row in readme, row
