"""Hardening: bad input on every command, safe artifacts, crash safety, determinism,
numerical health and resource guards.

Bad input must give ONE line on stderr that says what is wrong and how to fix it, exit code
2, and no file written (nothing partial). The end-to-end `fit` cases of tests/test_cli.py
are not repeated here; this module covers the other commands and the `fit` inputs that
module leaves out. The crash test kills a real `python -m hilbertune.cli fit` process with
SIGKILL and checks that rerunning the same command resumes to the identical result.
"""

from __future__ import annotations

import csv
import json
import math
import os
import shutil
import signal
import subprocess
import sys
import time
import tomllib
from pathlib import Path

import numpy as np
import pytest

from hilbertune import artifacts, cli
from hilbertune.errors import (ArtifactError, HilbertuneError, InvalidInputError,
                               NotFittedError, ResourceLimitError, TrainingError)

TINY = ["--set", "training.steps=4", "--set", "evaluation.repeats=2", "--set",
        "svm.cv_folds=2", "--set", "training.patience=0", "--set", "hardware.enabled=false",
        "--set", "selection.repeats=1"]


# --------------------------------------------------------------------------- helpers

def run(args, capsys):
    code = cli.main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def snapshot(path: Path):
    """Every file below ``path`` with its size and modification time (None if absent)."""
    if not path.exists():
        return None
    if path.is_file():
        return {".": (path.stat().st_size, path.stat().st_mtime_ns)}
    return {str(p.relative_to(path)): (p.stat().st_size, p.stat().st_mtime_ns)
            for p in sorted(path.rglob("*"))}


def assert_refused(code, err, fragment):
    """Exit 2, one line naming the problem, no traceback."""
    assert code == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("hilbertune: error: ") and "Traceback" not in err
    assert fragment in lines[0], lines[0]


def write_csv(path, header, rows):
    with open(path, "w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        writer.writerows(rows)
    return path


@pytest.fixture(scope="module")
def moons_csv(tmp_path_factory):
    from sklearn.datasets import make_moons  # outside data: scikit-learn's generator

    X, y = make_moons(n_samples=48, noise=0.15, random_state=1)
    path = tmp_path_factory.mktemp("data") / "moons.csv"
    return write_csv(path, ["a", "b", "kind"],
                     [[f"{u:.5f}", f"{v:.5f}", "upper" if k else "lower"]
                      for (u, v), k in zip(X, y)])


@pytest.fixture(scope="module")
def finished_run(moons_csv, tmp_path_factory):
    out = tmp_path_factory.mktemp("runs") / "tiny"
    code = cli.main(["fit", "--data", str(moons_csv), "--target", "kind", "--qubits", "2",
                     "--seed", "5", "--out", str(out), "--quiet", *TINY])
    assert code == 0
    return out


@pytest.fixture
def run_copy(finished_run, tmp_path):
    """A private copy of the finished run, free to damage."""
    copy = tmp_path / "copy"
    shutil.copytree(finished_run, copy)
    return copy


def sealed(manifest: dict) -> str:
    """Manifest JSON with a matching digest of its own: what a careful forger writes."""
    manifest = {k: v for k, v in manifest.items() if k != artifacts.MANIFEST_DIGEST}
    return json.dumps({**manifest, artifacts.MANIFEST_DIGEST: artifacts.manifest_digest(manifest)})


def rehash(run_dir: Path, name: str) -> None:
    """Update the manifest entry of ``name`` so only the content check can catch it."""
    manifest = json.loads((run_dir / "manifest.json").read_text())
    manifest["artifacts"][name] = artifacts.sha256_file(run_dir / name)
    (run_dir / "manifest.json").write_text(sealed(manifest))


# --------------------------------------------------------------------------- predict

BAD_PREDICT_CSV = [
    (None, "does not exist"),
    ("", "empty"),
    (b"PK\x03\x04\x00\x00binary", "binary"),
    ("1.0,2.0\n3.0,4.0\n", "missing feature column"),            # no header
    ("a,b,b\n1,2,3\n", "duplicate column"),
    ("a,kind\n1,x\n", "missing feature column(s) ['b']"),
    ("a,b\n", "no data rows"),
    ("a,b\n1,hello\n", "not numeric"),
    ("a,b\n1,nan\n", "missing or infinite"),
    ("a,b\n1,inf\n", "missing or infinite"),
    ("a,b\n1,2,3\n", "cells but the header"),
    (",,\n,,\n", "no header row"),
    (b"a;b\n\xff\xfe\n", "not UTF-8"),
]


@pytest.mark.parametrize("content, fragment", BAD_PREDICT_CSV)
def test_predict_refuses_a_bad_csv_in_one_line(finished_run, tmp_path, capsys, content,
                                               fragment):
    path = tmp_path / "new.csv"
    if isinstance(content, bytes):
        path.write_bytes(content)
    elif content is not None:
        path.write_text(content)
    before = snapshot(finished_run)
    out = tmp_path / "predictions.csv"
    code, stdout, err = run(["predict", finished_run, path, "--out", out], capsys)
    assert_refused(code, err, fragment)
    assert not out.exists() and stdout == ""
    assert snapshot(finished_run) == before


def test_predict_refuses_a_folder_as_csv_or_as_output(finished_run, moons_csv, tmp_path,
                                                      capsys):
    code, _, err = run(["predict", finished_run, tmp_path], capsys)
    assert_refused(code, err, "is a folder")
    code, _, err = run(["predict", finished_run, moons_csv, "--out", tmp_path], capsys)
    assert_refused(code, err, "is a folder")
    assert list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------------- not a run

def _interrupted_run(path: Path) -> Path:
    (path / "checkpoints").mkdir(parents=True)
    (path / "config.toml").write_text("seed = 0\n")
    return path


NOT_A_RUN = [
    ("missing", lambda p: p / "nope", "not found"),
    ("empty folder", lambda p: (p / "empty").mkdir() or p / "empty", "no manifest.json"),
    ("a file", lambda p: write_csv(p / "x.csv", ["a"], [[1]]), "is a file"),
    ("interrupted run", lambda p: _interrupted_run(p / "half"), "resumes with `hilbertune fit`"),
]


@pytest.mark.parametrize("command", ["report", "export", "reproduce", "predict"])
@pytest.mark.parametrize("label, make, fragment", NOT_A_RUN, ids=[c[0] for c in NOT_A_RUN])
def test_commands_on_something_that_is_not_a_finished_run(tmp_path, moons_csv, capsys,
                                                          command, label, make, fragment):
    target = make(tmp_path)
    before = snapshot(tmp_path)
    extra = {"predict": [moons_csv], "reproduce": ["--keep", tmp_path / "keep"],
             "export": ["--out", tmp_path / "c.qasm"], "report": []}[command]
    code, _, err = run([command, target, *extra], capsys)
    assert_refused(code, err, fragment)
    assert snapshot(tmp_path) == before  # no report, no keep dir, no export file


# --------------------------------------------------------------------------- safe artifacts

@pytest.mark.parametrize("command", ["predict", "reproduce", "export", "report"])
def test_a_modified_artifact_is_refused_by_name_on_every_reading_command(run_copy, moons_csv,
                                                                         capsys, command):
    arrays = dict(np.load(run_copy / "params.npz", allow_pickle=False))
    arrays["param_log_bandwidth"] = arrays["param_log_bandwidth"] + np.float32(0.5)
    np.savez(run_copy / "params.npz", **arrays)
    extra = [moons_csv] if command == "predict" else []
    code, _, err = run([command, run_copy, *extra], capsys)
    assert_refused(code, err, "params.npz")
    assert "modified" in err


@pytest.mark.parametrize("command", ["predict", "reproduce", "export", "report"])
def test_a_newer_format_is_refused_on_every_reading_command(run_copy, moons_csv, capsys,
                                                            command):
    manifest = json.loads((run_copy / "manifest.json").read_text())
    manifest["format_version"] = artifacts.FORMAT_VERSION + 1
    (run_copy / "manifest.json").write_text(sealed(manifest))
    extra = [moons_csv] if command == "predict" else []
    code, _, err = run([command, run_copy, *extra], capsys)
    assert_refused(code, err, "newer hilbertune")
    assert "upgrade" in err


class _Tripwire:
    """Unpickling this object creates a file: proof that a loader ran pickle."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (Path(self.marker),))


@pytest.mark.parametrize("command", ["predict", "reproduce"])
def test_pickled_arrays_are_never_unpickled_even_with_a_matching_hash(run_copy, moons_csv,
                                                                      tmp_path, capsys,
                                                                      command):
    marker = tmp_path / "pickle-ran"
    arrays = dict(np.load(run_copy / "params.npz", allow_pickle=False))
    arrays["param_weights"] = np.array([_Tripwire(str(marker))], dtype=object)
    np.savez(run_copy / "params.npz", **arrays)  # numpy pickles object arrays here
    rehash(run_copy, "params.npz")  # the hash matches: only the loader can refuse it
    extra = [moons_csv] if command == "predict" else []
    code, _, err = run([command, run_copy, *extra], capsys)
    assert_refused(code, err, "params.npz could not be read")
    assert not marker.exists()


@pytest.mark.parametrize("damage, fragment", [
    ("not json {", "manifest.json could not be read"),
    ("[1, 2]", "not a hilbertune manifest"),
    (sealed({"format_version": 1, "artifacts": {"../secret": "00"}}), "not a file of the run"),
    ('{"format_version": "1", "artifacts": {}}', "no valid format_version"),
    (sealed({"format_version": 1, "artifacts": {}}), "does not cover config.toml"),
    ('{"format_version": 1, "artifacts": {}}', "has no manifest_sha256"),
])
def test_a_damaged_manifest_is_refused_in_one_line(run_copy, capsys, damage, fragment):
    (run_copy / "manifest.json").write_text(damage)
    code, _, err = run(["export", run_copy], capsys)
    assert_refused(code, err, fragment)


def test_params_without_the_svm_arrays_are_refused(run_copy, moons_csv, capsys):
    arrays = dict(np.load(run_copy / "params.npz", allow_pickle=False))
    del arrays["X_train"]
    artifacts.write_npz(run_copy / "params.npz", arrays)
    rehash(run_copy, "params.npz")
    code, _, err = run(["predict", run_copy, moons_csv], capsys)
    assert_refused(code, err, "params.npz")


def test_atomic_write_keeps_the_old_file_when_writing_fails(tmp_path, monkeypatch):
    target = tmp_path / "summary.json"
    artifacts.write_json(target, {"v": 1})

    def broken_fsync(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", broken_fsync)
    with pytest.raises(OSError):
        artifacts.write_json(target, {"v": 2})
    monkeypatch.undo()
    assert json.loads(target.read_text()) == {"v": 1}
    assert [p.name for p in tmp_path.iterdir()] == ["summary.json"]  # no temporary left


def test_object_arrays_are_refused_before_anything_is_written(tmp_path):
    with pytest.raises(TypeError, match="dtype object"):
        artifacts.write_npz(tmp_path / "p.npz", {"o": np.array([None, 1], dtype=object)})
    assert list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------------- report, export

def test_export_and_report_on_a_good_run_write_only_what_they_should(finished_run, tmp_path,
                                                                    capsys):
    out = tmp_path / "circuit.qasm"
    code, _, err = run(["export", finished_run, "--out", out, "--quiet"], capsys)
    assert code == 0, err
    assert out.read_text().startswith("OPENQASM 3")
    code, _, err = run(["export", finished_run, "--out", tmp_path], capsys)
    assert_refused(code, err, "is a folder")


# --------------------------------------------------------------------------- sweep

SWEEPS = [
    ("[grid]\nseed = [1,\n", "not valid TOML"),
    ('[grid]\n"training.stpes" = [1, 2]\n', "did you mean 'training.steps'"),
    ("[grdi]\nseed = [1, 2]\n", "unknown sweep table"),
    ('[base]\ntraining.steps = "x"\n[grid]\nseed = [1, 2]\n', "must be int"),
    ('[grid]\n"training.steps" = [0, 2]\n', "must be positive"),
    ('[base]\ntraining.learning_rate = -0.1\n[grid]\nseed = [1, 2]\n', "must be positive"),
    ('[grid]\n"evaluation.shots" = [0]\n', "must be positive"),
    ("", "varies nothing"),
    ('[base]\ndata.source = "csv"\ndata.path = "no/such.csv"\ndata.target = "y"\n'
     '[grid]\nseed = [1, 2]\n', "does not exist"),
    ('[base]\ndata.source = "moons"\ndata.samples = 40\n'
     '[grid]\n"encoding.qubits" = [2, 30]\n', "GiB"),
]


@pytest.mark.parametrize("text, fragment", SWEEPS)
def test_sweep_refuses_bad_descriptions_before_writing(tmp_path, capsys, text, fragment):
    description = tmp_path / "sweep.toml"
    description.write_text(text)
    out = tmp_path / "sweep"
    code, _, err = run(["sweep", description, "--out", out], capsys)
    assert_refused(code, err, fragment)
    assert not out.exists()


def test_sweep_refuses_missing_binary_files_and_bad_worker_counts(tmp_path, capsys):
    out = tmp_path / "sweep"
    code, _, err = run(["sweep", tmp_path / "nope.toml", "--out", out], capsys)
    assert_refused(code, err, "not found")
    (tmp_path / "bin.toml").write_bytes(b"\x00\xff\xfe")
    code, _, err = run(["sweep", tmp_path / "bin.toml", "--out", out], capsys)
    assert_refused(code, err, "not UTF-8")
    (tmp_path / "ok.toml").write_text("[grid]\nseed = [1, 2]\n")
    code, _, err = run(["sweep", tmp_path / "ok.toml", "--workers", "0", "--out", out], capsys)
    assert_refused(code, err, "--workers")
    assert not out.exists()


def test_sweep_refuses_an_output_directory_of_another_sweep_or_a_file(tmp_path, capsys):
    description = tmp_path / "sweep.toml"
    description.write_text('[base]\ndata.source = "moons"\ndata.samples = 40\n'
                           '[grid]\nseed = [1, 2]\n')
    other = tmp_path / "other"
    other.mkdir()
    (other / "sweep.json").write_text(json.dumps({"name": "old", "description_hash": "0" * 64}))
    (other / "results.csv").write_text("trial_id,status\n")
    before = snapshot(other)
    code, _, err = run(["sweep", description, "--out", other], capsys)
    assert_refused(code, err, "different sweep")
    assert snapshot(other) == before
    afile = tmp_path / "file"
    afile.write_text("x")
    code, _, err = run(["sweep", description, "--out", afile], capsys)
    assert_refused(code, err, "is a file")
    assert afile.read_text() == "x"


def test_sweep_refuses_parallel_trials_that_do_not_fit_in_memory_together(tmp_path, capsys,
                                                                         monkeypatch):
    # 48 samples x 2**16 amplitudes x 8 bytes = 24 MiB per trial (common practice: complex64)
    description = tmp_path / "sweep.toml"
    description.write_text('[base]\ndata.source = "moons"\ndata.samples = 48\n'
                           'encoding.qubits = 16\n[grid]\nseed = [1, 2]\n')
    monkeypatch.setattr(cli, "_physical_memory", lambda: 40 * 2**20)
    out = tmp_path / "sweep"
    code, _, err = run(["sweep", description, "--workers", "2", "--out", out], capsys)
    assert_refused(code, err, "0.05 GiB")  # two trials x 24 MiB
    assert "fewer --workers" in err and not out.exists()


# --------------------------------------------------------------------------- demo

def test_demo_refuses_an_existing_directory_and_leaves_it_alone(finished_run, tmp_path,
                                                                capsys):
    before = snapshot(finished_run)
    code, _, err = run(["demo", "--out", finished_run], capsys)
    assert_refused(code, err, "--overwrite")
    assert snapshot(finished_run) == before
    afile = tmp_path / "file"
    afile.write_text("x")
    code, _, err = run(["demo", "--out", afile], capsys)
    assert_refused(code, err, "is a file")
    code, _, err = run(["demo", "--seed", "-1", "--out", tmp_path / "d"], capsys)
    assert_refused(code, err, "non-negative")
    code, _, err = run(["demo", "--seed", "x"], capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "d").exists()


# --------------------------------------------------------------------------- fit (the rest)

FIT_TOML = [
    ('[training]\nstpes = 3\n', "did you mean 'training.steps'"),
    ('[training]\nsteps = "ten"\n', "must be int"),
    ('[training]\nsteps = 0\n', "must be positive"),
    ('[training]\nlearning_rate = -0.5\n', "must be positive"),
    ('[evaluation]\nshots = -1\n', "must be positive"),
    ('[hardware]\nshots_grid = [100, 0]\n', "positive integers"),
    ('[compute]\nmemory_budget = "lots"\n', "not understood"),
    ('[encoding]\nfamily = "quantum"\n', "one of"),
    ("seed = 1.5\n", "must be int"),
    ('training = 3\n', "unknown config key"),
]


@pytest.mark.parametrize("text, fragment", FIT_TOML)
def test_fit_refuses_a_bad_config_file(moons_csv, tmp_path, capsys, text, fragment):
    path = tmp_path / "c.toml"
    path.write_text(text)
    out = tmp_path / "out"
    code, _, err = run(["fit", path, "--data", moons_csv, "--target", "kind", "--out", out],
                       capsys)
    assert_refused(code, err, fragment)
    assert not out.exists()


FIT_DATA = [
    ("a,b,kind\n1,2,x\n3,4,\n", "empty or NaN label"),
    ("kind\nx\ny\n", "at least one feature"),
    ("a,b,kind\n", "no data rows"),
    ("a,b,kind\n1,2,x\n3,4,y\n5,6,z\n", "single sample"),
]


@pytest.mark.parametrize("content, fragment", FIT_DATA)
def test_fit_refuses_more_bad_csv_files(tmp_path, capsys, content, fragment):
    path = tmp_path / "d.csv"
    path.write_text(content)
    out = tmp_path / "out"
    code, _, err = run(["fit", "--data", path, "--target", "kind", "--out", out], capsys)
    assert_refused(code, err, fragment)
    assert not out.exists()


def test_fit_refuses_a_data_file_as_config_and_a_misspelt_dataset(moons_csv, tmp_path, capsys):
    code, _, err = run(["fit", moons_csv, "--out", tmp_path / "o"], capsys)
    assert_refused(code, err, "--data")
    code, _, err = run(["fit", "--data", "irsi", "--out", tmp_path / "o"], capsys)
    assert_refused(code, err, "did you mean 'iris'")
    assert not (tmp_path / "o").exists()


def test_projected_kernel_with_too_many_qubits_gives_the_estimate(moons_csv, tmp_path, capsys):
    # 48 rows x 2**30 amplitudes x 8 bytes (complex64) = 384 GiB of statevectors
    code, _, err = run(["fit", "--data", moons_csv, "--target", "kind", "--qubits", "30",
                        "--set", "encoding.kind=projected", "--out", tmp_path / "o"], capsys)
    assert_refused(code, err, "384.00 GiB")
    assert "fewer qubits" in err and not (tmp_path / "o").exists()


def test_a_fit_that_fails_after_creating_its_directory_removes_it(moons_csv, tmp_path, capsys):
    # ridge_kfold with more folds than training rows is only detected by the training code
    out = tmp_path / "out"
    code, _, err = run(["fit", "--data", moons_csv, "--target", "kind", "--qubits", "2",
                        "--out", out, "--set", "training.objective=ridge_kfold",
                        "--set", "training.folds=40", *TINY], capsys)
    assert_refused(code, err, "folds")
    assert not out.exists()


# --------------------------------------------------------------------------- exit codes

@pytest.mark.parametrize("error, code, prefix", [
    (InvalidInputError("bad value; use a good one"), 2, "error"),
    (ResourceLimitError("needs 3 GiB; use fewer qubits"), 2, "error"),
    (ArtifactError("x.npz was modified; restore it"), 2, "error"),
    (NotFittedError("call fit first"), 1, "failed"),
    (TrainingError("gradient not finite; lower the learning rate"), 1, "failed"),
    (HilbertuneError("something else"), 1, "failed"),
    (MemoryError(), 1, "failed"),
    (OSError(13, "Permission denied", "/x"), 1, "failed"),
    (KeyboardInterrupt(), 130, "interrupted"),
])
def test_exit_codes_match_the_table_in_developers_md(monkeypatch, capsys, error, code, prefix):
    def command(args, console):
        raise error

    monkeypatch.setitem(cli.COMMANDS, "export", command)
    got, out, err = run(["export", "anything"], capsys)
    assert got == code
    assert err.startswith(f"hilbertune: {prefix}") and len(err.strip().splitlines()) == 1


def test_an_error_message_with_line_breaks_still_prints_as_one_line(monkeypatch, capsys):
    def command(args, console):
        raise InvalidInputError("column 'a\nb' is not numeric;\nfix it")

    monkeypatch.setitem(cli.COMMANDS, "report", command)
    code, _, err = run(["report", "x"], capsys)
    assert_refused(code, err, "column 'a b' is not numeric; fix it")


# --------------------------------------------------------------------------- crash safety

CRASH_STEPS = 300
CRASH_ARGS = ["--qubits", "2", "--seed", "11", "--quiet",
              "--set", f"training.steps={CRASH_STEPS}", "--set", "training.checkpoint_every=10",
              "--set", "training.patience=0", "--set", "evaluation.repeats=2",
              "--set", "svm.cv_folds=2", "--set", "hardware.enabled=false",
              "--set", "selection.repeats=1"]
DETERMINISTIC = ("params.npz", "history.csv", "kernels.npz", "config.toml", "circuit.qasm")


def fit_command(csv_path, out):
    return [sys.executable, "-m", "hilbertune.cli", "fit", "--data", str(csv_path),
            "--target", "kind", "--out", str(out), *CRASH_ARGS]


@pytest.fixture(scope="module")
def reference_run(moons_csv, tmp_path_factory):
    """An uninterrupted run in a fresh process."""
    out = tmp_path_factory.mktemp("reference") / "run"
    done = subprocess.run(fit_command(moons_csv, out), capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stderr
    return out


def temporaries(path: Path) -> list:
    return [p for p in path.rglob("*") if p.name.endswith(".tmp") or p.name.startswith(".tmp-")]


@pytest.mark.slow
def test_a_killed_fit_resumes_to_the_identical_result(moons_csv, reference_run, tmp_path,
                                                      monkeypatch, capsys):
    out = tmp_path / "run"
    process = subprocess.Popen(fit_command(moons_csv, out), stdout=subprocess.DEVNULL,
                               stderr=subprocess.DEVNULL)
    # one checkpoint folder per training run of the main split (checkpoints/<scope>-<objective>)
    marker = out / "checkpoints" / "full-centered_alignment" / "checkpoint.json"
    deadline = time.monotonic() + 240
    try:
        while not marker.exists():
            assert process.poll() is None, "the fit ended before writing a checkpoint"
            assert time.monotonic() < deadline, "no checkpoint within 240 s"
            time.sleep(0.005)
        process.send_signal(signal.SIGKILL)
        process.wait(timeout=30)
    finally:
        if process.poll() is None:
            process.kill()
    assert process.returncode == -signal.SIGKILL

    # what the killed process left: complete files under their final names, no manifest
    assert not (out / "manifest.json").exists()
    saved = tomllib.loads((out / "config.toml").read_text())
    assert saved["training"]["steps"] == CRASH_STEPS
    state = json.loads(marker.read_text())
    with np.load(marker.parent / "checkpoint.npz", allow_pickle=False) as npz:
        assert len(npz.files) > 0
    assert 0 < state["step"] < CRASH_STEPS, "the kill did not land inside training"

    # rerun the same command (in this process, to watch the checkpoint being loaded)
    from hilbertune import training

    resumed_at = []
    original = training._load_checkpoint

    def spy(*args, **kwargs):
        loaded = original(*args, **kwargs)
        if loaded is not None:
            resumed_at.append(loaded[0]["next_step"])
        return loaded

    monkeypatch.setattr(training, "_load_checkpoint", spy)
    argv = fit_command(moons_csv, out)[3:]
    code, _, err = run(argv, capsys)
    assert code == 0, err
    assert resumed_at and resumed_at[0] >= state["step"] > 0
    for name in DETERMINISTIC:
        assert (out / name).read_bytes() == (reference_run / name).read_bytes(), name
    assert temporaries(out) == [] and not (out / "checkpoints").exists()
    artifacts.verify_run(out)


@pytest.mark.slow
def test_two_fresh_processes_write_bit_identical_results(moons_csv, reference_run, tmp_path):
    out = tmp_path / "again"
    done = subprocess.run(fit_command(moons_csv, out), capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stderr
    for name in DETERMINISTIC:
        assert (out / name).read_bytes() == (reference_run / name).read_bytes(), name
    history = (out / "history.csv").read_text().splitlines()
    assert len(history) == CRASH_STEPS + 2  # header + steps 0..CRASH_STEPS
    assert "wall_time" not in history[0]
    summary = json.loads((out / "summary.json").read_text())
    assert summary["training"]["wall_time_s"] > 0


def test_a_run_killed_before_its_first_checkpoint_resumes(moons_csv, tmp_path, capsys):
    from hilbertune import config as cfg

    out = tmp_path / "run"
    argv = ["fit", "--data", moons_csv, "--target", "kind", "--qubits", "2", "--out", out,
            "--quiet", *TINY]
    config = cli._fit_config(cli.build_parser().parse_args([str(a) for a in argv]))
    out.mkdir()
    (out / "config.toml").write_text(cfg.dump_toml(config))  # all a killed start leaves
    (out / ".params.npz.x1y2.tmp").write_bytes(b"half")  # a write cut off by the kill
    code, _, err = run(argv, capsys)
    assert code == 0, err
    assert temporaries(out) == []
    artifacts.verify_run(out)
    # a different config in the same directory is not taken for the same run
    code, _, err = run([*argv[:-len(TINY)], *TINY, "--seed", "9"], capsys)
    assert_refused(code, err, "--overwrite")


# --------------------------------------------------------------------------- numerics

def test_float32_and_float64_grams_agree():
    import jax
    import jax.numpy as jnp

    from hilbertune.circuits import initial_params
    from hilbertune.encodings import build_encoding
    from hilbertune.kernels import projected_gram, quantum_gram

    rng = np.random.default_rng(4)
    X = rng.uniform(0, math.pi, size=(6, 3))
    # complex64 round-off: ~1e-7 per operation, a few dozen gates (common practice)
    for bp, projected in ((build_encoding("layered", 3, layers=2, entangler="ring"), True),
                          (build_encoding("iqp", 3, layers=2), False)):
        params = initial_params(bp, jax.random.key(1), bandwidth=0.8, bias_scale=0.3)
        single = np.asarray(quantum_gram(bp, params, X), np.float64)
        with jax.enable_x64(True):
            double = np.asarray(quantum_gram(bp, params, X, dtype=jnp.complex128))
        np.testing.assert_allclose(single, double, atol=2e-5)
        assert double.dtype == np.float64
        if projected:
            proj_single = np.asarray(projected_gram(bp, params, X), np.float64)
            with jax.enable_x64(True):
                proj_double = np.asarray(projected_gram(bp, params, X, dtype=jnp.complex128))
            np.testing.assert_allclose(proj_single, proj_double, atol=2e-5)


@pytest.mark.parametrize("bandwidth", [1e-4, 1e4])
def test_extreme_bandwidths_keep_gradients_finite_or_stop_clearly(bandwidth):
    from hilbertune.encodings import build_encoding
    from hilbertune.training import TrainingSettings, train_encoding

    rng = np.random.default_rng(0)
    X = rng.uniform(0, math.pi, size=(16, 2))
    y = (X[:, 0] > X[:, 1]).astype(int)
    bp = build_encoding("layered", 2, layers=1)
    settings = TrainingSettings(steps=3, bandwidth=bandwidth, validation_fraction=0.25,
                                patience=0)
    try:
        result = train_encoding(bp, X, y, settings, seed=0)
    except TrainingError as exc:
        assert "not finite" in str(exc) and "bandwidth" in str(exc)
        return
    norms = [row["grad_norm"] for row in result.history]
    assert norms and all(math.isfinite(v) for v in norms)
    for value in result.params.values():
        assert np.isfinite(np.asarray(value)).all()
    if "non-finite" in (result.stop_reason or ""):
        assert "kept the parameters" in result.stop_reason


def test_gradient_of_the_alignment_is_finite_at_extreme_bandwidths():
    import jax
    import jax.numpy as jnp

    from hilbertune import objectives
    from hilbertune.circuits import initial_params
    from hilbertune.encodings import build_encoding
    from hilbertune.kernels import gram_for_training

    bp = build_encoding("iqp", 2, layers=1)
    X = jnp.asarray(np.random.default_rng(1).uniform(0, math.pi, (8, 2)), jnp.float32)
    y = jnp.asarray([0, 1] * 4)
    mask = jnp.ones(8, bool)
    target = objectives.target_matrix(y, 2)
    @jax.jit
    def gradient(p):
        def loss(q):
            return -objectives.centered_alignment(gram_for_training(bp, q, X), target, mask)
        return jax.grad(loss)(p)

    for bandwidth in (1e-4, 1e4):
        grads = gradient(initial_params(bp, jax.random.key(0), bandwidth=bandwidth))
        for name, g in grads.items():
            assert np.isfinite(np.asarray(g)).all(), (bandwidth, name)


# --------------------------------------------------------------------------- resource guards

def test_gram_refuses_before_allocating_with_the_estimate():
    from hilbertune.circuits import initial_params
    from hilbertune.encodings import build_encoding
    from hilbertune.kernels import quantum_gram

    bp = build_encoding("layered", 2, n_qubits=26, layers=1)
    X = np.zeros((10, 2))
    # 10 states x 2**26 amplitudes x 8 bytes = 5 GiB > 1 GiB (common practice: complex64)
    with pytest.raises(ResourceLimitError, match=r"5\.00 GiB"):
        quantum_gram(bp, initial_params(bp), X, memory_budget="1GiB")
    small = build_encoding("layered", 2, n_qubits=3, layers=1)
    # states fit (1 KiB) but a 200 x 200 float32 Gram (160 KB) does not fit in 100 KB
    with pytest.raises(ResourceLimitError, match="Gram"):
        quantum_gram(small, initial_params(small), np.zeros((200, 2)), memory_budget="100KB")


def test_density_matrix_simulation_refuses_too_many_qubits():
    from hilbertune import hardware
    from hilbertune.encodings import build_encoding

    n = hardware.DENSITY_MATRIX_MAX_QUBITS + 1
    bp = build_encoding("angle", n)
    with pytest.raises(ResourceLimitError, match="density-matrix"):
        hardware.density_matrix_kernel(bp, {"weights": np.ones(n), "biases": np.zeros(n),
                                            "log_bandwidth": np.float32(0.0)},
                                       np.zeros((2, n)))


# =========================================================================== issue 14
# No run can be lost or corrupted. Each test below reproduces one item of issue 14.

def _fit_after_barrier(barrier, argv, results):
    """A whole `hilbertune fit` in its own process, started when both processes are ready."""
    import contextlib
    import io

    from hilbertune import cli as child_cli

    barrier.wait(timeout=120)
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        code = child_cli.main(argv)
    results.put((argv[argv.index("--seed") + 1], code, err.getvalue()))


def test_item1_two_fits_into_one_directory_one_is_refused_and_the_run_is_whole(
        finished_run, moons_csv, tmp_path):
    import multiprocessing

    out = tmp_path / "shared"
    shutil.copytree(finished_run, out)  # both replace a finished run: --overwrite
    context = multiprocessing.get_context("spawn")
    barrier, results = context.Barrier(2), context.Queue()
    argvs = [["fit", "--data", str(moons_csv), "--target", "kind", "--qubits", "2", "--seed",
              seed, "--out", str(out), "--overwrite", "--quiet", *TINY] for seed in ("21", "22")]
    workers = [context.Process(target=_fit_after_barrier, args=(barrier, argv, results))
               for argv in argvs]
    for worker in workers:
        worker.start()
    outcomes = [results.get(timeout=300) for _ in workers]
    for worker in workers:
        worker.join(timeout=60)
    codes = sorted(code for _, code, _ in outcomes)
    assert codes == [0, 2], outcomes
    (winner, _, _), = [o for o in outcomes if o[1] == 0]
    (_, _, refusal), = [o for o in outcomes if o[1] == 2]
    assert_refused(2, refusal, "is being written by another hilbertune process")
    # the manifest describes the artifacts of one run, the winner's, and nothing else
    manifest = artifacts.verify_run(out)
    assert manifest["seed"] == int(winner)
    assert tomllib.loads((out / "config.toml").read_text())["seed"] == int(winner)
    assert json.loads((out / "summary.json").read_text())["seed"] == int(winner)
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.startswith(".shared")]
    assert leftovers == []  # no lock file, no build directory


def test_item1_a_held_lock_refuses_fit_reproduce_and_sweep_at_once(finished_run, moons_csv,
                                                                   tmp_path, capsys):
    import multiprocessing

    from hilbertune import rundir

    out = tmp_path / "busy"
    context = multiprocessing.get_context("spawn")
    ready, release = context.Event(), context.Event()
    holder = context.Process(target=_hold_lock, args=(str(out), ready, release))
    holder.start()
    try:
        assert ready.wait(timeout=120)
        code, _, err = run(["fit", "--data", moons_csv, "--target", "kind", "--qubits", "2",
                            "--out", out, *TINY], capsys)
        assert_refused(code, err, f"process {holder.pid}")
        code, _, err = run(["reproduce", finished_run, "--keep", out], capsys)
        assert_refused(code, err, "another hilbertune process")
        description = tmp_path / "s.toml"
        description.write_text('[base]\ndata.source = "moons"\n[grid]\n"seed" = [1, 2]\n')
        code, _, err = run(["sweep", description, "--out", out], capsys)
        assert_refused(code, err, "sweep directory")
        assert not out.exists()
    finally:
        release.set()
        holder.join(timeout=60)
    assert not rundir.lock_path(out).exists()  # the holder removed its lock file


def _hold_lock(target, ready, release):
    from hilbertune import rundir

    with rundir.exclusive(target):
        ready.set()
        release.wait(timeout=120)


def test_item2_reproduce_keep_refuses_an_existing_run_without_overwrite(finished_run, tmp_path,
                                                                        capsys):
    other = tmp_path / "other"
    shutil.copytree(finished_run, other)
    before = snapshot(other)
    code, _, err = run(["reproduce", finished_run, "--keep", other], capsys)
    assert_refused(code, err, "--overwrite")
    assert snapshot(other) == before
    code, _, err = run(["reproduce", finished_run, "--keep", finished_run, "--overwrite"], capsys)
    assert_refused(code, err, "is the run being reproduced")
    afile = tmp_path / "afile"
    afile.write_text("x")
    code, _, err = run(["reproduce", finished_run, "--keep", afile], capsys)
    assert_refused(code, err, "--keep")  # item 15: names the option the user gave
    assert "--out" not in err and afile.read_text() == "x"


def test_item3_outputs_never_land_on_run_artifacts_or_inputs(run_copy, moons_csv, tmp_path,
                                                             capsys):
    before = snapshot(run_copy)
    link = tmp_path / "innocent.txt"
    link.symlink_to(run_copy / "params.npz")
    hard = tmp_path / "hard.npz"
    os.link(run_copy / "summary.json", hard)
    cases = [(["export", run_copy, "--out", run_copy / "manifest.json"], "artifact of the run"),
             (["export", run_copy, "--out", link], "artifact of the run"),
             (["export", run_copy, "--out", hard], "same file as summary.json"),
             (["predict", run_copy, moons_csv, "--out", run_copy / "params.npz"],
              "artifact of the run"),
             (["predict", run_copy, moons_csv, "--out", run_copy / "config.toml", "--overwrite"],
              "artifact of the run")]
    pipe = tmp_path / "pipe"
    os.mkfifo(pipe)  # an atomic write would have replaced it (as it did /dev/full)
    cases.append((["export", run_copy, "--out", pipe], "not a regular file"))
    for argv, fragment in cases:
        code, _, err = run(argv, capsys)
        assert_refused(code, err, fragment)
    assert snapshot(run_copy) == before
    assert pipe.is_fifo()
    artifacts.verify_run(run_copy)
    rows = tmp_path / "rows.csv"
    shutil.copy(moons_csv, rows)
    code, _, err = run(["predict", run_copy, rows, "--out", rows], capsys)
    assert_refused(code, err, "is the input file")
    assert rows.read_bytes() == moons_csv.read_bytes()
    code, _, err = run(["predict", run_copy, rows, "--out", rows, "--overwrite", "--quiet"],
                       capsys)
    assert code == 0, err
    assert rows.read_text().startswith("row,prediction\n")
    # a file of the user's own in the run directory is fine
    code, _, err = run(["predict", run_copy, moons_csv, "--out", run_copy / "mine.csv",
                        "--quiet"], capsys)
    assert code == 0, err and (run_copy / "mine.csv").is_file()


def test_item4_a_failing_overwrite_keeps_the_old_run(run_copy, tmp_path, capsys):
    constant = write_csv(tmp_path / "flat.csv", ["a", "b", "kind"],
                         [[1.0, 2.0, "x" if i % 2 else "y"] for i in range(20)])
    (run_copy / "notes.txt").write_text("mine")
    before = snapshot(run_copy)
    code, _, err = run(["fit", "--data", constant, "--target", "kind", "--qubits", "2",
                        "--out", run_copy, "--overwrite", *TINY], capsys)
    assert_refused(code, err, "every feature column is constant")
    assert snapshot(run_copy) == before
    artifacts.verify_run(run_copy)
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_item4_a_successful_overwrite_swaps_in_whole_and_keeps_the_users_files(
        run_copy, moons_csv, tmp_path, capsys):
    (run_copy / "notes.txt").write_text("mine")
    (run_copy / "plots").mkdir()
    (run_copy / "plots" / "a.png").write_bytes(b"png")
    code, _, err = run(["fit", "--data", moons_csv, "--target", "kind", "--qubits", "2",
                        "--seed", "31", "--out", run_copy, "--overwrite", "--quiet", *TINY],
                       capsys)
    assert code == 0, err
    assert artifacts.verify_run(run_copy)["seed"] == 31
    assert (run_copy / "notes.txt").read_text() == "mine"
    assert (run_copy / "plots" / "a.png").read_bytes() == b"png"
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


@pytest.mark.slow
def test_item4_a_killed_overwrite_keeps_the_old_run_and_resumes(finished_run, moons_csv,
                                                                 tmp_path, monkeypatch, capsys):
    from hilbertune import rundir, training

    out = tmp_path / "run"
    shutil.copytree(finished_run, out)
    before = snapshot(out)
    command = fit_command(moons_csv, out) + ["--overwrite"]
    marker = (rundir.build_path(out) / "checkpoints" / "full-centered_alignment"
              / "checkpoint.json")
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 240
    try:
        while not marker.exists():
            assert process.poll() is None, "the fit ended before writing a checkpoint"
            assert time.monotonic() < deadline, "no checkpoint within 240 s"
            time.sleep(0.005)
        process.send_signal(signal.SIGKILL)
        process.wait(timeout=30)
    finally:
        if process.poll() is None:
            process.kill()
    assert snapshot(out) == before  # the old run, untouched and still valid
    artifacts.verify_run(out)
    resumed_at = []
    original = training._load_checkpoint

    def spy(*args, **kwargs):
        loaded = original(*args, **kwargs)
        if loaded is not None:
            resumed_at.append(loaded[0]["next_step"])
        return loaded

    monkeypatch.setattr(training, "_load_checkpoint", spy)
    code, _, err = run(command[3:], capsys)
    assert code == 0, err
    assert resumed_at and resumed_at[0] > 0
    assert artifacts.verify_run(out)["seed"] == 11
    assert not rundir.build_path(out).exists()


class _ManifestTrial:
    """A sweep trial that writes a small verified run directory (no training)."""

    def __call__(self, config, out_dir, *, overwrite=False, progress=False):
        out = Path(out_dir)
        out.mkdir(parents=True, exist_ok=True)
        with open(out / "calls.txt", "a") as handle:
            handle.write("1\n")
        summary = {"seed": config["seed"], "test_accuracy": 0.5 + config["seed"] / 100,
                   "selection": {"cv_accuracy": 0.4 + config["seed"] / 100},
                   "wall_time_s": 0.25}
        artifacts.write_json(out / "summary.json", summary)
        artifacts.write_npz(out / "params.npz", {"w": np.arange(3.0)})
        artifacts.write_manifest(out, seed=config["seed"], data_sha256="0" * 64,
                                 artifacts=["summary.json", "params.npz"])
        return summary


SWEEP4 = {"sweep": {"name": "four"}, "base": {"data": {"source": "moons"}},
          "grid": {"seed": [1, 2, 3, 4]}}


def _calls(out, row):
    path = out / "trials" / row["trial_id"] / "calls.txt"
    return len(path.read_text().splitlines()) if path.exists() else 0


def test_item5_a_sweep_reruns_finished_trials_whose_directories_fail_verification(tmp_path,
                                                                                 capsys):
    from hilbertune.sweeps import run_sweep

    out = tmp_path / "sweep"
    rows = run_sweep(SWEEP4, out, trial_fn=_ManifestTrial())
    assert [r["status"] for r in rows] == ["ok"] * 4
    shutil.rmtree(out / "trials" / rows[0]["trial_id"])
    artifacts.write_npz(out / "trials" / rows[1]["trial_id"] / "params.npz", {"w": np.ones(3)})
    capsys.readouterr()
    again = run_sweep(SWEEP4, out, trial_fn=_ManifestTrial(), progress=True)
    err = capsys.readouterr().err
    assert [r["status"] for r in again] == ["ok"] * 4
    assert [_calls(out, r) for r in again] == [1, 2, 1, 1]  # the deleted one starts anew
    assert f"trial {rows[0]['trial_id']} was recorded as finished but its run directory is " \
           "missing; running it again" in err
    assert f"trial {rows[1]['trial_id']} was recorded as finished but params.npz" in err
    assert "2 already finished and verified (skipped), 2 to run" in err
    for row in again:
        artifacts.verify_run(out / "trials" / row["trial_id"])


@pytest.mark.parametrize("damage", [b"\xff\xfe\x00garbage\x81\n", "ragged", "no header"])
def test_item8_a_damaged_results_table_is_rebuilt_from_the_trial_directories(tmp_path, capsys,
                                                                              damage):
    from hilbertune.sweeps import read_results, run_sweep

    out = tmp_path / "sweep"
    rows = run_sweep(SWEEP4, out, trial_fn=_ManifestTrial())
    table = out / "results.csv"
    if damage == "ragged":
        lines = table.read_text().splitlines()
        table.write_text("\n".join(lines[:2] + [lines[2] + ",extra,cells"] + lines[3:]) + "\n")
    elif damage == "no header":
        table.write_text("a,b\n1,2\n")
    else:
        table.write_bytes(damage)
    with pytest.raises(ArtifactError, match="results.csv .* is damaged"):
        read_results(out)
    capsys.readouterr()
    again = run_sweep(SWEEP4, out, trial_fn=_ManifestTrial(), progress=True)
    err = capsys.readouterr().err
    assert "rebuilt it from 4 verified trial" in err and "Traceback" not in err
    assert [_calls(out, r) for r in again] == [1, 1, 1, 1]  # nothing reran
    assert [r["selection.cv_accuracy"] for r in again] == [r["selection.cv_accuracy"]
                                                           for r in rows]
    assert read_results(out) == again


def test_item6_seeds_beyond_32_bits_are_refused_at_the_boundary(moons_csv, tmp_path, capsys):
    from hilbertune import config as cfg

    out = tmp_path / "o"
    base = ["fit", "--data", moons_csv, "--target", "kind", "--out", out]
    code, _, err = run([*base, "--seed", "4294967296"], capsys)
    assert_refused(code, err, "at most 4294967295")
    toml = tmp_path / "c.toml"
    toml.write_text("seed = 12345678901234567890\n")
    code, _, err = run(["fit", toml, "--data", moons_csv, "--target", "kind", "--out", out],
                       capsys)
    assert_refused(code, err, "at most 4294967295")
    code, _, err = run(["demo", "--seed", str(2**64), "--out", out], capsys)
    assert_refused(code, err, "at most 4294967295")
    assert not out.exists()
    assert cfg.resolve_config({"seed": 2**32 - 1})["seed"] == 2**32 - 1


def _real_checkpoint(directory, steps=2):
    from hilbertune.encodings import build_encoding
    from hilbertune.training import TrainingSettings, train_encoding

    rng = np.random.default_rng(0)
    X, y = rng.uniform(0, 3, (16, 2)), np.array([0, 1] * 8)
    settings = TrainingSettings(steps=steps, checkpoint_every=1, validation_fraction=0.0)
    train_encoding(build_encoding("angle", 2), X, y, settings, seed=0,
                   checkpoint_dir=str(directory))
    return Path(directory)


@pytest.mark.parametrize("damage", ["truncate", "flip"])
def test_item7_a_damaged_checkpoint_is_reported_and_training_restarts(moons_csv, tmp_path,
                                                                      capsys, damage):
    from hilbertune import config as cfg
    from hilbertune import training

    out = tmp_path / "run"
    argv = ["fit", "--data", moons_csv, "--target", "kind", "--qubits", "2", "--out", out,
            "--quiet", *TINY]
    config = cli._fit_config(cli.build_parser().parse_args([str(a) for a in argv]))
    # where the fit keeps the checkpoints of its fully learned candidate's training run
    checkpoints = _real_checkpoint(out / "checkpoints" / "full-centered_alignment")
    (out / "config.toml").write_text(cfg.dump_toml(config))  # an interrupted run
    npz = checkpoints / "checkpoint.npz"
    payload = bytearray(npz.read_bytes())
    if damage == "truncate":
        npz.write_bytes(bytes(payload[: len(payload) // 2]))
    else:
        payload[len(payload) // 3] ^= 0x01
        npz.write_bytes(bytes(payload))
    problem = training.checkpoint_problem(checkpoints)
    assert problem and "is damaged" in problem
    with pytest.raises(ArtifactError, match="is damaged"):  # the library: one clean error
        training._load_checkpoint(str(checkpoints), "x", None)
    code, _, err = run(argv, capsys)
    assert code == 0, err
    assert "note: checkpoint" in err and "training restarts from step 0" in err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    artifacts.verify_run(out)


def test_item7_a_checkpoint_newer_than_its_record_is_not_taken_for_damage(tmp_path):
    from hilbertune import training

    checkpoints = _real_checkpoint(tmp_path / "a", steps=2)
    record = (checkpoints / "checkpoint.json").read_bytes()
    assert training.checkpoint_problem(checkpoints) is None
    _real_checkpoint(tmp_path / "b", steps=4)
    # a kill between the two writes of a checkpoint: the newer archive, the older record
    shutil.copy(tmp_path / "b" / "checkpoint.npz", checkpoints / "checkpoint.npz")
    (checkpoints / "checkpoint.json").write_bytes(record)
    assert training.checkpoint_problem(checkpoints) is None
    # an older (or equal) archive that does not match its record is damage
    shutil.copy(tmp_path / "b" / "checkpoint.json", checkpoints / "checkpoint.json")
    _real_checkpoint(tmp_path / "c", steps=2)
    shutil.copy(tmp_path / "c" / "checkpoint.npz", checkpoints / "checkpoint.npz")
    assert "differs from checkpoint.json" in training.checkpoint_problem(checkpoints)


@pytest.mark.parametrize("value", ["1e300", "-1e300", "1e200"])
def test_item9_an_extreme_outlier_is_refused_with_its_line(moons_csv, tmp_path, capsys, value):
    lines = moons_csv.read_text().splitlines()
    cells = lines[7].split(",")
    lines[7] = ",".join([value] + cells[1:])
    bad = tmp_path / "bad.csv"
    bad.write_text("\n".join(lines) + "\n")
    out = tmp_path / "o"
    code, _, err = run(["fit", "--data", bad, "--target", "kind", "--qubits", "2", "--out", out,
                        *TINY], capsys)
    assert_refused(code, err, "in column 'a' at line 8")
    assert "robust spreads" in err and not out.exists()


def test_item9_predict_applies_the_same_rule(finished_run, moons_csv, tmp_path, capsys):
    lines = moons_csv.read_text().splitlines()
    lines[3] = ",".join(["1e300"] + lines[3].split(",")[1:])
    bad = tmp_path / "new.csv"
    bad.write_text("\n".join(lines) + "\n")
    code, stdout, err = run(["predict", finished_run, bad], capsys)
    assert_refused(code, err, "data row 3")
    assert stdout == ""


def test_item9_heavy_tails_of_real_data_pass():
    from sklearn.datasets import load_breast_cancer, load_digits

    from hilbertune.data import check_feature_values

    for X in (load_digits().data, load_breast_cancer().data):
        check_feature_values(X, [f"c{k}" for k in range(X.shape[1])],
                             [f"line {i + 2}" for i in range(len(X))], "x.csv")
    X = np.column_stack([np.linspace(0, 1, 50), np.linspace(0, 1, 50)])
    X[10, 1] = 1e12
    with pytest.raises(InvalidInputError, match="column 'c1' at line 12"):
        check_feature_values(X, ["c0", "c1"], [f"line {i + 2}" for i in range(50)], "x.csv")


def test_item10_all_constant_features_name_the_columns(tmp_path, capsys):
    flat = write_csv(tmp_path / "flat.csv", ["height", "width", "kind"],
                     [[1.5, -2.0, "x" if i % 2 else "y"] for i in range(20)])
    code, _, err = run(["fit", "--data", flat, "--target", "kind", "--out", tmp_path / "o"],
                       capsys)
    assert_refused(code, err, "every feature column is constant (height, width)")
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("family, qubits, fragment", [
    ("iqp", 30, "allows at most 2 qubit(s)"),
    ("angle", 3, "allows at most 2 qubit(s)"),
    ("basis", 5, "one qubit per feature"),
    ("amplitude", 60, "amplitude encoding uses ceil(log2(features)) x copies = 1 qubit(s)"),
])
def test_item11_a_qubit_count_the_family_cannot_use_is_refused(moons_csv, tmp_path, capsys,
                                                               family, qubits, fragment):
    out = tmp_path / "o"
    code, _, err = run(["fit", "--data", moons_csv, "--target", "kind", "--qubits", qubits,
                        "--set", f"encoding.family={family}", "--out", out], capsys)
    assert_refused(code, err, fragment)
    assert not out.exists()


def test_item11_matching_or_unstated_qubit_counts_pass(moons_csv, tmp_path):
    def config(*extra):
        argv = ["fit", "--data", str(moons_csv), "--target", "kind", *extra]
        return cli._fit_config(cli.build_parser().parse_args(argv))

    assert config("--qubits", "2", "--set", "encoding.family=iqp")["encoding"]["qubits"] == 2
    assert config("--set", "encoding.family=iqp")["encoding"]["qubits"] == 4  # the default
    assert config("--qubits", "7")["encoding"]["qubits"] == 7  # layered: any count
    toml = tmp_path / "c.toml"
    toml.write_text('[encoding]\nfamily = "amplitude"\nqubits = 9\n')
    with pytest.raises(InvalidInputError, match="drop --qubits or set it to 1"):
        cli._fit_config(cli.build_parser().parse_args(
            ["fit", str(toml), "--data", str(moons_csv), "--target", "kind"]))


@pytest.mark.parametrize("table, count", [
    ('[random]\ncount = 100000000000\n"training.learning_rate" = {uniform = [0.01, 0.1]}\n',
     "100000000000 trials"),
    ("[grid]\n" + "".join(f'"{k}" = [{", ".join(str(v) for v in range(1, 51))}]\n'
                          for k in ("seed", "training.steps", "encoding.layers",
                                    "evaluation.shots")), "6250000 trials"),
])
def test_item12_a_runaway_sweep_is_counted_before_it_is_built(tmp_path, capsys, table, count):
    description = tmp_path / "s.toml"
    description.write_text('[base]\ndata.source = "moons"\n' + table)
    started = time.perf_counter()
    code, _, err = run(["sweep", description, "--out", tmp_path / "o"], capsys)
    assert_refused(code, err, count)
    assert "--max-trials" in err and time.perf_counter() - started < 5
    assert not (tmp_path / "o").exists()


def test_item12_max_trials_raises_the_limit():
    from hilbertune.sweeps import plan_sweep

    description = {"base": {"data": {"source": "moons"}}, "grid": {"seed": list(range(12))}}
    with pytest.raises(InvalidInputError, match="12 trials .*limit of 10"):
        plan_sweep(description, max_trials=10)
    assert len(plan_sweep(description, max_trials=12).trials) == 12


def test_item13_reproduce_from_elsewhere_finds_or_checks_the_data(moons_csv, tmp_path,
                                                                   monkeypatch, capsys):
    home, elsewhere = tmp_path / "home", tmp_path / "elsewhere"
    home.mkdir()
    elsewhere.mkdir()
    shutil.copy(moons_csv, home / "data.csv")
    monkeypatch.chdir(home)
    code, _, err = run(["fit", "--data", "data.csv", "--target", "kind", "--qubits", "2",
                        "--out", "run", "--quiet", *TINY], capsys)
    assert code == 0, err
    run_dir = home / "run"
    manifest = artifacts.verify_run(run_dir)
    assert manifest["data_path"] == str((home / "data.csv").resolve())
    assert tomllib.loads((run_dir / "config.toml").read_text())["data"]["path"] == "data.csv"
    monkeypatch.chdir(elsewhere)
    code, _, err = run(["reproduce", run_dir, "--quiet"], capsys)  # via the resolved path
    assert code == 0, err
    moved = elsewhere / "moved.csv"
    (home / "data.csv").rename(moved)
    code, _, err = run(["reproduce", run_dir], capsys)
    assert_refused(code, err, "pass it with --data PATH")
    other = write_csv(elsewhere / "other.csv", ["a", "b", "kind"], [[1, 2, "x"], [2, 1, "y"]])
    code, _, err = run(["reproduce", run_dir, "--data", other], capsys)
    assert_refused(code, err, "is not the file the run was made with")
    code, _, err = run(["reproduce", run_dir, "--data", moved, "--quiet"], capsys)
    assert code == 0, err


@pytest.mark.parametrize("field, value", [("seed", 6), ("data_sha256", "0" * 64),
                                          ("data_path", "/elsewhere.csv")])
def test_item14_the_manifests_own_fields_cannot_be_edited_undetected(run_copy, moons_csv,
                                                                     capsys, field, value):
    manifest = json.loads((run_copy / "manifest.json").read_text())
    manifest[field] = value
    (run_copy / "manifest.json").write_text(json.dumps(manifest, indent=2))
    for command in (["report", run_copy], ["export", run_copy],
                    ["predict", run_copy, moons_csv], ["reproduce", run_copy]):
        code, _, err = run(command, capsys)
        assert_refused(code, err, "manifest.json")
        assert "was edited after the run" in err


def test_item15_memory_budget_as_an_integer_number_of_bytes():
    from hilbertune import config as cfg
    from hilbertune.kernels import resolve_memory_budget

    config = cfg.resolve_config({"compute": {"memory_budget": 2_000_000_000}})
    assert resolve_memory_budget(config["compute"]["memory_budget"]) == 2_000_000_000
    assert cfg.resolve_config(overrides=[cfg.parse_assignment("compute.memory_budget=4096")])[
        "compute"]["memory_budget"] == "4096"
    with pytest.raises(InvalidInputError, match="at least 1 byte"):
        cfg.resolve_config({"compute": {"memory_budget": 0}})


def test_item15_fit_on_a_folder_and_the_one_class_message(tmp_path, capsys):
    code, _, err = run(["fit", tmp_path], capsys)
    assert_refused(code, err, "is a folder, not a config file")
    one = write_csv(tmp_path / "one.csv", ["a", "b", "label"], [[i, i * 2 % 5, 1]
                                                                for i in range(10)])
    code, _, err = run(["fit", "--data", one, "--target", "label", "--out", tmp_path / "o"],
                       capsys)
    assert_refused(code, err, "has only one class ('1')")
    assert "np.int64" not in err


def test_item15_json_errors_print_one_object_on_stdout(tmp_path, capsys):
    code, out, err = run(["report", tmp_path / "nope", "--json"], capsys)
    assert code == 2 and err.startswith("hilbertune: error:")
    record = json.loads(out)
    assert record["exit_code"] == 2 and "not found" in record["error"]
    code, out, _ = run(["fit", "--bogus-option", "--json"], capsys)
    assert code == 2 and json.loads(out)["exit_code"] == 2
    code, out, _ = run(["report", tmp_path / "nope"], capsys)
    assert code == 2 and out == ""


def test_item15_report_refuses_pickled_params_even_with_a_matching_hash(run_copy, tmp_path,
                                                                        capsys):
    marker = tmp_path / "pickle-ran"
    arrays = dict(np.load(run_copy / "params.npz", allow_pickle=False))
    arrays["param_weights"] = np.array([_Tripwire(str(marker))], dtype=object)
    np.savez(run_copy / "params.npz", **arrays)
    rehash(run_copy, "params.npz")
    before = snapshot(run_copy)
    code, _, err = run(["report", run_copy], capsys)
    assert_refused(code, err, "params.npz could not be read")
    assert not marker.exists() and snapshot(run_copy) == before


def test_item11_a_sweep_with_a_conflicting_qubit_count_is_refused_up_front(tmp_path, capsys):
    description = tmp_path / "s.toml"
    description.write_text('[base]\ndata.source = "moons"\nencoding.family = "iqp"\n'
                           '[grid]\n"encoding.qubits" = [2, 5]\n')
    code, _, err = run(["sweep", description, "--out", tmp_path / "o"], capsys)
    assert_refused(code, err, "encoding.qubits=5")
    assert "allows at most 2 qubit(s)" in err and not (tmp_path / "o").exists()
