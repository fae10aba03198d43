"""Sweeps: planning and validation, results table, resume, refusal, joblib and Dask runs."""

from __future__ import annotations

import base64
import math
import os
import re
import socket
import time
from pathlib import Path

import pytest

from hilbertune import config as cfg
from hilbertune.errors import InvalidInputError
from hilbertune.sweeps import (config_id, flatten_summary, plan_sweep, read_results,
                               render_sweep_report, run_sweep, sort_rows)


# --------------------------------------------------------------------------- a fake trial

def fake_trial(config, out_dir, *, overwrite=False, progress=False):
    """Stand-in for runs.execute_fit: a deterministic summary, no training.

    ``data.path`` (unused by non-CSV sources) names a marker file: while it exists, trials
    with 3 qubits raise. Every call appends a line to ``calls.txt`` in its run directory, so
    tests can count calls across worker processes.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    with open(out / "calls.txt", "a") as handle:
        handle.write(f"{os.getpid()}\n")
    qubits, steps = config["encoding"]["qubits"], config["training"]["steps"]
    marker = config["data"]["path"]
    if qubits == 3 and marker and Path(marker).exists():
        raise ValueError(f"simulated failure for {qubits} qubits\nsecond line")
    worker = ""
    try:
        from distributed import get_worker
        worker = get_worker().address
    except (ImportError, ValueError):
        pass
    # selection.cv_accuracy: the key the fit's summary carries once inner-CV selection
    # lands (issue 13); a made-up value here, ordered like test_accuracy
    return {"n_qubits": qubits, "test_accuracy": 0.5 + 0.1 * qubits + 0.01 * steps,
            "selection": {"cv_accuracy": 0.4 + 0.1 * qubits + 0.01 * steps},
            "alignment": {"initial": 0.1, "final": 0.2 + 0.01 * steps},
            "baselines": {"rbf_svm": {"test_accuracy": 0.75},
                          "linear_svm": {"test_accuracy": 0.55}},
            "significance": {"verdict": "no evidence", "per_repeat": [0.1, 0.2]},
            "cpus": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else -1,
            "xla_flags": os.environ.get("XLA_FLAGS", ""), "worker": worker, "pid": os.getpid()}


def calls(out_dir, row) -> int:
    path = Path(out_dir) / "trials" / row["trial_id"] / "calls.txt"
    return len(path.read_text().splitlines()) if path.exists() else 0


def grid_sweep(marker="", qubits=(2, 3), steps=(1, 2), **sweep):
    return {"sweep": {"name": "unit", **sweep},
            "base": {"seed": 1, "data": {"source": "moons", "path": str(marker)}},
            "grid": {"encoding.qubits": list(qubits), "training": {"steps": list(steps)}}}


# --------------------------------------------------------------------------- planning

def test_grid_is_the_cartesian_product_with_stable_ids():
    plan = plan_sweep(grid_sweep(qubits=(2, 3, 4), steps=(5, 6)))
    assert plan.swept_keys == ("encoding.qubits", "training.steps")
    assert [dict(t.assignments) for t in plan.trials] == [
        {"encoding.qubits": q, "training.steps": s} for q in (2, 3, 4) for s in (5, 6)]
    for trial in plan.trials:
        assert trial.config["encoding"]["qubits"] == dict(trial.assignments)["encoding.qubits"]
        assert trial.config["data"]["source"] == "moons" and trial.config["seed"] == 1
        assert trial.trial_id == config_id(trial.config)
    assert len({t.trial_id for t in plan.trials}) == 6
    again = plan_sweep(grid_sweep(qubits=(2, 3, 4), steps=(5, 6)))
    assert [t.trial_id for t in again.trials] == [t.trial_id for t in plan.trials]
    assert again.description_hash == plan.description_hash


def test_dotted_and_quoted_keys_describe_the_same_sweep():
    import tomllib

    quoted = tomllib.loads('[grid]\n"training.steps" = [1, 2]\n"encoding.qubits" = [2]\n')
    dotted = tomllib.loads('[grid]\ntraining.steps = [1, 2]\nencoding.qubits = [2]\n')
    assert quoted != dotted  # TOML nests the unquoted form
    assert plan_sweep(quoted).description_hash == plan_sweep(dotted).description_hash


def test_sweep_options_do_not_change_the_sweep_identity():
    a = plan_sweep(grid_sweep(metric="alignment.final"))
    b = plan_sweep(grid_sweep(name="renamed"))
    assert a.description_hash == b.description_hash and a.metric == "alignment.final"
    assert plan_sweep(grid_sweep(steps=(1, 3))).description_hash != a.description_hash


def test_random_draws_are_reproducible_and_inside_their_ranges():
    description = {"random": {
        "count": 40, "seed": 5,
        "training.learning_rate": {"log_uniform": [0.001, 0.1]},
        "encoding.bias_scale": {"uniform": [0.0, 0.5]},
        "encoding.layers": {"int": [1, 3]},
        "encoding.entangler": {"choice": ["ring", "linear"]}}}
    plan = plan_sweep(description)
    values = [dict(t.assignments) for t in plan.trials]
    assert len(values) == len(plan.trials) <= 40
    assert all(0.001 <= v["training.learning_rate"] <= 0.1 for v in values)
    assert all(0.0 <= v["encoding.bias_scale"] <= 0.5 for v in values)
    assert {v["encoding.layers"] for v in values} == {1, 2, 3}  # both ends included
    assert {v["encoding.entangler"] for v in values} == {"ring", "linear"}
    # log-uniform: as many draws below the geometric mean 0.01 as above (loosely)
    below = sum(v["training.learning_rate"] < 0.01 for v in values)
    assert 10 <= below <= 30
    assert [t.trial_id for t in plan_sweep(description).trials] == \
        [t.trial_id for t in plan.trials]
    description["random"]["seed"] = 6
    assert plan_sweep(description).description_hash != plan.description_hash


def test_grid_and_random_combine_as_grid_points_times_draws():
    description = {"grid": {"encoding.qubits": [2, 3]},
                   "random": {"count": 3, "training.learning_rate": {"uniform": [0.01, 0.1]}}}
    plan = plan_sweep(description)
    assert len(plan.trials) == 6
    rates = [[dict(t.assignments)["training.learning_rate"] for t in plan.trials
              if dict(t.assignments)["encoding.qubits"] == q] for q in (2, 3)]
    assert rates[0] == rates[1] and len(set(rates[0])) == 3  # paired draws


def test_random_table_may_sweep_the_run_seed():
    # in [random], a scalar `seed` seeds the draws; a distribution table sweeps the run seed
    plan = plan_sweep({"random": {"count": 5, "seed": {"int": [0, 10**6]}}})
    assert plan.swept_keys == ("seed",)
    assert len({t.config["seed"] for t in plan.trials}) == 5


@pytest.mark.parametrize("description, message", [
    ({"grid": {"training.step": [1, 2]}}, "did you mean 'training.steps'"),
    ({"grid": {"encoding": {"qubit": [1, 2]}}}, "did you mean 'encoding.qubits'"),
    ({"random": {"count": 2, "learning_rate": {"uniform": [0.1, 0.2]}}},
     "did you mean 'training.learning_rate'"),
    ({"base": {"training": {"stepz": 3}}, "grid": {"seed": [1]}}, "sweep \\[base\\].*stepz"),
    ({"grid": {}}, "\\[grid\\] is empty"),
    ({"grid": {"training.steps": []}}, "empty list"),
    ({"grid": {"training.steps": 5}}, "must be a list"),
    ({"base": {"seed": 1}}, "varies nothing"),
    ({"grdi": {"training.steps": [1]}}, "did you mean \\[grid\\]"),
    ({"sweep": {"metrik": "x"}, "grid": {"seed": [1]}}, "did you mean 'metric'"),
    ({"random": {"training.steps": {"int": [1, 3]}}}, "count"),
    ({"random": {"count": 2, "encoding.bandwidth": {"uniform": [1.0, 0.5]}}}, "low < high"),
    ({"random": {"count": 2, "encoding.bandwidth": {"log_uniform": [0.0, 1.0]}}},
     "0 < low"),
    ({"random": {"count": 2, "encoding.bandwidth": {"normal": [0.0, 1.0]}}},
     "one distribution table"),
    ({"random": {"count": 2, "encoding.layers": {"int": [1.5, 3]}}}, "two integers"),
    ({"random": {"count": 2, "encoding.axis": {"choice": []}}}, "non-empty list"),
    ({"grid": {"seed": [1]}, "random": {"count": 1, "seed": {"int": [0, 3]}}},
     "both \\[grid\\] and \\[random\\]"),
])
def test_invalid_descriptions_are_refused_with_a_fix(description, message):
    with pytest.raises(InvalidInputError, match=message):
        plan_sweep(description)


def test_a_bad_value_names_the_trial():
    with pytest.raises(InvalidInputError,
                       match=r"trial 3 of 4 \(encoding.qubits=0, training.steps=1\).*positive"):
        plan_sweep(grid_sweep(qubits=(2, 0), steps=(1, 2)))
    with pytest.raises(InvalidInputError, match=r"trial 2 of 2 .*encoding.family='layerd'"):
        plan_sweep({"grid": {"encoding.family": ["angle", "layerd"]}})


def test_every_swept_key_is_a_config_key():
    # the suggestion list comes from the config schema (config.all_keys)
    assert "training.steps" in cfg.all_keys()
    plan = plan_sweep({"grid": {key: [cfg.defaults()[key.split(".")[0]][key.split(".")[1]]]
                                for key in ("training.steps", "encoding.qubits")}})
    assert len(plan.trials) == 1


# --------------------------------------------------------------------------- results table

def test_flatten_summary_keeps_scalars_with_dotted_keys():
    flat = flatten_summary({"a": 1, "b": {"c": 0.5, "d": {"e": "x"}, "f": [1, 2]}, "g": None})
    assert flat == {"a": 1, "b.c": 0.5, "b.d.e": "x", "g": None}


def test_sort_puts_best_first_and_failures_last():
    rows = [{"trial_id": "a", "status": "ok", "m": 0.2}, {"trial_id": "b", "status": "failed"},
            {"trial_id": "c", "status": "ok", "m": 0.9}, {"trial_id": "d", "status": "ok"}]
    assert [r["trial_id"] for r in sort_rows(rows, "m")] == ["c", "a", "d", "b"]
    assert [r["trial_id"] for r in sort_rows(rows, "m", False)] == ["a", "c", "d", "b"]


def test_sequential_sweep_records_failures_and_resumes(tmp_path):
    marker = tmp_path / "fail-three-qubits"
    marker.write_text("x")
    out = tmp_path / "sweep"
    rows = run_sweep(grid_sweep(marker), out, trial_fn=fake_trial)
    assert [r["status"] for r in rows] == ["ok", "ok", "failed", "failed"]
    failed = rows[2]
    assert failed["error"] == "ValueError: simulated failure for 3 qubits second line"
    assert "Traceback" in (out / "errors" / f"{failed['trial_id']}.txt").read_text()
    ok = rows[1]
    assert ok["encoding.qubits"] == 2 and ok["training.steps"] == 2
    assert ok["test_accuracy"] == pytest.approx(0.72) and ok["alignment.final"] == 0.22
    assert ok["baselines.rbf_svm.test_accuracy"] == 0.75
    assert "significance.per_repeat" not in ok  # lists are left out of the table
    assert read_results(out) == rows  # the CSV reads back to the same typed rows
    report = (out / "sweep_report.html").read_text()
    assert report.count("data:image/png;base64,") == 2  # one plot per swept key
    png = re.search(r"base64,([A-Za-z0-9+/=]+)", report).group(1)
    assert base64.b64decode(png)[:8] == b"\x89PNG\r\n\x1a\n"
    order = re.findall(r"<tr class='(?:ok|failed)'><td>\d+</td>.*?>([0-9a-f]{12})<", report)
    assert order[:2] == [rows[1]["trial_id"], rows[0]["trial_id"]]  # sorted by the metric
    assert "tuned RBF SVM 0.7500" in report

    # resume: the two OK trials are skipped, the failed ones run again and now succeed
    marker.unlink()
    again = run_sweep(grid_sweep(marker), out, trial_fn=fake_trial)
    assert [r["status"] for r in again] == ["ok"] * 4
    assert [calls(out, r) for r in again] == [1, 1, 2, 2]
    def unranked(table):
        return [{k: v for k, v in r.items() if k != "rank"} for r in table[:2]]

    assert unranked(again) == unranked(rows)  # kept rows; ranks move as trials finish
    assert [r["rank"] for r in rows] == [2, 1, None, None]
    assert [r["rank"] for r in again] == [4, 3, 2, 1]  # by selection.cv_accuracy
    assert {r["ranked_by"] for r in again} == {"selection.cv_accuracy"}
    third = run_sweep(grid_sweep(marker), out, trial_fn=fake_trial)
    assert [calls(out, r) for r in third] == [1, 1, 2, 2] and third == again
    assert "0 failed" in render_sweep_report(out)


def test_a_different_sweep_in_the_same_directory_is_refused(tmp_path):
    out = tmp_path / "sweep"
    run_sweep(grid_sweep(), out, trial_fn=fake_trial)
    before = (out / "results.csv").read_bytes()
    with pytest.raises(InvalidInputError, match="different sweep.*another --out"):
        run_sweep(grid_sweep(steps=(1, 3)), out, trial_fn=fake_trial)
    assert (out / "results.csv").read_bytes() == before

    stray = tmp_path / "stray"
    stray.mkdir()
    (stray / "results.csv").write_text("trial_id,status\n")
    with pytest.raises(InvalidInputError, match="without sweep.json"):
        run_sweep(grid_sweep(), stray, trial_fn=fake_trial)
    assert (stray / "results.csv").read_text() == "trial_id,status\n"


def test_unreachable_scheduler_fails_fast_and_writes_nothing(tmp_path):
    # port 9 (discard) on the loopback interface: nothing listens there in a test machine;
    # check that first so the test cannot pass for the wrong reason
    with pytest.raises(OSError):
        socket.create_connection(("127.0.0.1", 9), timeout=2).close()
    out = tmp_path / "never"
    started = time.perf_counter()
    with pytest.raises(InvalidInputError, match="cannot reach the Dask scheduler at "
                                                "tcp://127.0.0.1:9"):
        run_sweep(grid_sweep(), out, scheduler="tcp://127.0.0.1:9", trial_fn=fake_trial,
                  connect_timeout=5)
    assert time.perf_counter() - started < 10
    assert not out.exists()
    with pytest.raises(InvalidInputError, match="tcp://127.0.0.1:8786"):
        run_sweep(grid_sweep(), out, scheduler="127.0.0.1:8786", trial_fn=fake_trial)
    with pytest.raises(InvalidInputError, match="workers must be a positive integer"):
        run_sweep(grid_sweep(), out, workers=0, trial_fn=fake_trial)
    assert not out.exists()


# --------------------------------------------------------------------------- parallel runs

@pytest.mark.slow
def test_joblib_workers_run_trials_in_pinned_processes(tmp_path):
    marker = tmp_path / "fail"
    marker.write_text("x")
    out = tmp_path / "sweep"
    rows = run_sweep(grid_sweep(marker), out, workers=2, trial_fn=fake_trial)
    assert [r["status"] for r in rows] == ["ok", "ok", "failed", "failed"]
    ok = [r for r in rows if r["status"] == "ok"]
    assert all(r["pid"] != os.getpid() for r in ok)  # worker processes, not this one
    assert all("--xla_cpu_multi_thread_eigen=false" in r["xla_flags"] for r in ok)
    if hasattr(os, "sched_getaffinity") and len(os.sched_getaffinity(0)) >= 2:
        share = len(os.sched_getaffinity(0)) // 2
        assert all(r["cpus"] <= share for r in ok)  # each trial on its share of the CPUs
    assert read_results(out) == rows


@pytest.mark.slow
def test_dask_local_cluster_on_loopback_runs_the_sweep(tmp_path):
    marker = tmp_path / "fail"
    marker.write_text("x")
    out = tmp_path / "sweep"
    started = time.perf_counter()
    rows = run_sweep(grid_sweep(marker), out, workers=2, scheduler="local",
                     trial_fn=fake_trial)
    assert time.perf_counter() - started < 60
    assert [r["status"] for r in rows] == ["ok", "ok", "failed", "failed"]
    ok = [r for r in rows if r["status"] == "ok"]
    assert all(r["worker"].startswith("tcp://127.0.0.1:") for r in ok)  # loopback only
    assert all(r["pid"] != os.getpid() for r in ok)
    assert math.isclose(ok[1]["test_accuracy"], 0.72)
    assert read_results(out) == rows


@pytest.mark.slow
def test_sweep_with_the_real_run_function_on_tiny_data(tmp_path):
    # trial_fn=None: each trial is a full runs.execute_fit run directory
    tiny = {"data": {"source": "moons", "samples": 40}, "encoding": {"qubits": 2},
            "training": {"steps": 3}, "evaluation": {"repeats": 2},
            "hardware": {"enabled": False}, "svm": {"cv_folds": 2, "C": 1.0},
            "selection": {"repeats": 1}}
    out = tmp_path / "sweep"
    rows = run_sweep({"base": tiny, "grid": {"training.steps": [2, 3]}}, out)
    assert [r["status"] for r in rows] == ["ok", "ok"], [r["error"] for r in rows]
    import json
    for row in rows:
        trial_dir = out / "trials" / row["trial_id"]
        summary = json.loads((trial_dir / "summary.json").read_text())
        assert row["test_accuracy"] == summary["test_accuracy"]
        assert 0.0 <= row["test_accuracy"] <= 1.0
        assert row["alignment.final"] == summary["alignment"]["final"]
        assert row["baselines.rbf_svm.test_accuracy"] == \
            summary["baselines"]["rbf_svm"]["test_accuracy"]
        assert (trial_dir / "report.html").is_file()  # the sweep report links to it
        assert cfg.load_toml(trial_dir / "config.toml")["training"]["steps"] == \
            row["training.steps"]
    report = (out / "sweep_report.html").read_text()
    assert "tuned RBF SVM" in report and f"trials/{rows[0]['trial_id']}/report.html" in report


def test_retired_key_in_a_sweep_names_the_new_one():
    with pytest.raises(InvalidInputError, match="sweep \\[grid\\].*renamed to 'encoding.layers'"):
        plan_sweep({"grid": {"encoding.reps": [1, 2]}})
