"""End-to-end command line: fit, predict, report, export, reproduce, demo, bad input.

The fits use tiny settings (2 qubits, few steps) so the whole module stays fast; the
numbers are checked for consistency with independent computations, not for quality.
"""

import csv
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from hilbertune import cli

TINY = ["--set", "data.samples=48", "--set", "training.steps=4", "--set",
        "evaluation.repeats=2", "--set", "svm.cv_folds=2", "--set", "training.patience=0",
        "--set", "selection.repeats=1"]


def run(args, capsys):
    code = cli.main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def write_csv(path, header, rows):
    with open(path, "w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        writer.writerows(rows)
    return path


@pytest.fixture(scope="module")
def small_csv(tmp_path_factory):
    from sklearn.datasets import make_moons

    X, y = make_moons(n_samples=48, noise=0.15, random_state=1)
    labels = np.where(y == 1, "upper", "lower")
    path = tmp_path_factory.mktemp("data") / "moons.csv"
    return write_csv(path, ["a", "b", "kind"], [[f"{u:.5f}", f"{v:.5f}", k]
                                                for (u, v), k in zip(X, labels)])


@pytest.fixture(scope="module")
def fitted_run(small_csv, tmp_path_factory):
    out = tmp_path_factory.mktemp("runs") / "first"
    code = cli.main(["fit", "--data", str(small_csv), "--target", "kind", "--qubits", "2",
                     "--seed", "3", "--out", str(out), "--quiet",
                     "--set", "hardware.shots_grid=[32, 256]",
                     "--set", "hardware.readout_error=0.02", *TINY])
    assert code == 0
    return out


CONTRACT_KEYS = ["n_qubits", "seed", "objective", "train_accuracy", "test_accuracy",
                 "untrained_test_accuracy", "alignment", "baselines", "significance",
                 "diagnostics"]


def test_fit_writes_every_artifact_and_the_summary_contract(fitted_run):
    names = {p.name for p in fitted_run.iterdir()}
    assert {"config.toml", "manifest.json", "params.npz", "history.csv", "summary.json",
            "report.html", "circuit.qasm", "kernels.npz"} <= names
    summary = json.loads((fitted_run / "summary.json").read_text())
    for key in CONTRACT_KEYS:
        assert key in summary, key
    assert summary["seed"] == 3 and summary["n_qubits"] == 2
    for key in ("initial", "final"):
        assert -1.0 <= summary["alignment"][key] <= 1.0
    for name in ("rbf_svm", "linear_svm"):
        assert 0.0 <= summary["baselines"][name]["test_accuracy"] <= 1.0
    sig = summary["significance"]
    assert {"test", "p_value", "verdict"} <= set(sig)
    assert "no evidence" in sig["verdict"]
    diag = summary["diagnostics"]
    assert {"concentration", "effective_dimension", "geometric_difference"} <= set(diag)
    assert summary["dataset"]["classes"] == ["lower", "upper"]
    noise = summary["hardware"]["device_noise"]
    assert noise["readout_error"] == 0.02 and "readout flips" in noise["model"]


def test_summary_accuracy_matches_an_independent_svm_on_the_stored_kernels(fitted_run):
    # scikit-learn SVC on the stored train Gram reproduces the reported train accuracy
    from sklearn.svm import SVC

    summary = json.loads((fitted_run / "summary.json").read_text())
    kernels = np.load(fitted_run / "kernels.npz", allow_pickle=False)
    params = np.load(fitted_run / "params.npz", allow_pickle=False)
    model = SVC(kernel="precomputed", C=float(params["svm_C"]))
    model.fit(kernels["train_final"], kernels["y_train"])
    acc = np.mean(model.predict(kernels["train_final"]) == kernels["y_train"])
    assert acc == pytest.approx(summary["train_accuracy"])


def test_report_is_valid_html_with_every_section(fitted_run, capsys):
    from html.parser import HTMLParser

    from hilbertune.report import SECTIONS

    # the report is derived from the other artifacts: a missing one, or one written by an
    # older version (here: other bytes), is rebuilt, and the manifest records the new file
    # so that every later command still trusts the run
    (fitted_run / "report.html").unlink()
    code, out, err = run(["report", fitted_run], capsys)
    assert code == 0, err
    with open(fitted_run / "report.html", "a") as handle:
        handle.write("<!-- an older version's report -->")
    code, out, err = run(["report", fitted_run], capsys)
    assert code == 0, err
    assert "older version" not in (fitted_run / "report.html").read_text()
    code, out, err = run(["export", fitted_run, "--format", "qasm3"], capsys)
    assert code == 0, err  # the manifest was sealed again with the rebuilt report's digest
    text = (fitted_run / "report.html").read_text()

    class Checker(HTMLParser):
        def __init__(self):
            super().__init__()
            self.stack, self.ids = [], set()

        def handle_starttag(self, tag, attrs):
            self.ids.update(v for k, v in attrs if k == "id")
            if tag not in ("meta", "img", "br", "link", "input"):
                self.stack.append(tag)

        def handle_endtag(self, tag):
            assert self.stack and self.stack[-1] == tag, f"unbalanced </{tag}>"
            self.stack.pop()

    checker = Checker()
    checker.feed(text)
    assert checker.stack == []
    for key, title in SECTIONS:
        assert key in checker.ids and title in text
    assert "http://" not in text and "https://" not in text  # opens offline
    assert "simulated" in text


def test_predict_matches_the_test_accuracy_on_the_run_split(fitted_run, small_csv, tmp_path,
                                                           capsys):
    out = tmp_path / "pred.csv"
    code, _, err = run(["predict", fitted_run, small_csv, "--out", out], capsys)
    assert code == 0, err
    rows = list(csv.DictReader(open(out)))
    assert len(rows) == 48 and {r["prediction"] for r in rows} <= {"lower", "upper"}
    labels = [r["kind"] for r in csv.DictReader(open(small_csv))]
    agreement = np.mean([p["prediction"] == t for p, t in zip(rows, labels)])
    assert agreement > 0.5


def test_export_prints_qasm_and_resources(fitted_run, capsys):
    code, out, err = run(["export", fitted_run, "--format", "qasm3"], capsys)
    assert code == 0, err
    assert out.startswith("OPENQASM 3") and "qubits 2" in out


def test_reproduce_is_identical(fitted_run, capsys):
    code, out, err = run(["reproduce", fitted_run], capsys)
    assert code == 0, err
    assert "identical" in out


def test_modified_artifact_is_refused_by_name(fitted_run, tmp_path, capsys):
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(fitted_run, copy)
    with open(copy / "history.csv", "a") as handle:
        handle.write("999,0,0,0,0,0,0\n")
    code, _, err = run(["export", copy], capsys)
    assert code == 2 and "history.csv" in err and "modified" in err


def test_existing_output_directory_is_refused_and_kept(fitted_run, small_csv, capsys):
    before = {p.name: p.stat().st_mtime_ns for p in fitted_run.iterdir()}
    code, _, err = run(["fit", "--data", small_csv, "--target", "kind", "--out", fitted_run,
                        *TINY], capsys)
    assert code == 2 and "--overwrite" in err
    assert {p.name: p.stat().st_mtime_ns for p in fitted_run.iterdir()} == before


@pytest.mark.parametrize("content, fragment", [
    (None, "does not exist"),
    ("", "empty"),
    ("1,2,3\n4,5,6\n", "header"),
    ("a,a,kind\n1,2,x\n", "duplicate"),
    ("a,b,kind\n1,2,x\n3,4,x\n", "one class"),
    ("a,b,kind\n1,hello,x\n3,4,y\n", "not numeric"),
    ("a,b,kind\n1,nan,x\n3,4,y\n", "--drop-missing"),
    ("a,b,kind\n1,inf,x\n3,4,y\n", "infinite"),
    (b"\x00\x01\x02binary", "binary"),
])
def test_bad_csv_is_one_line_exit_2(tmp_path, capsys, content, fragment):
    path = tmp_path / "bad.csv"
    if isinstance(content, bytes):
        path.write_bytes(content)
    elif content is not None:
        path.write_text(content)
    out_dir = tmp_path / "out"
    code, out, err = run(["fit", "--data", path, "--target", "kind", "--out", out_dir], capsys)
    assert code == 2
    assert fragment in err, err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert not out_dir.exists()  # nothing written


def test_unknown_target_and_config_key_suggest_the_fix(small_csv, tmp_path, capsys):
    code, _, err = run(["fit", "--data", small_csv, "--target", "knd", "--out",
                        tmp_path / "o"], capsys)
    assert code == 2 and "did you mean 'kind'" in err
    code, _, err = run(["fit", "--data", small_csv, "--target", "kind", "--set",
                        "training.stpes=3", "--out", tmp_path / "o"], capsys)
    assert code == 2 and "did you mean 'training.steps'" in err


@pytest.mark.parametrize("setting, toml, fragment", [
    ("encoding.reps=2", "[encoding]\nreps = 2\n", "renamed to 'encoding.layers'"),
    ("hardware.estimator=compute_uncompute", '[hardware]\nestimator = "compute_uncompute"\n',
     "renamed to 'inversion_test'"),
])
def test_retired_config_names_exit_2_with_the_new_name(tmp_path, capsys, setting, toml,
                                                       fragment):
    config = tmp_path / "old.toml"
    config.write_text(toml)
    for args in (["--set", setting], [config]):
        code, _, err = run(["fit", *args, "--out", tmp_path / "o"], capsys)
        assert code == 2 and fragment in err, err
        assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert not (tmp_path / "o").exists()


def test_reproduce_maps_old_names_of_an_older_run(fitted_run, tmp_path, capsys):
    import shutil

    from hilbertune import artifacts

    old = tmp_path / "old"
    shutil.copytree(fitted_run, old)
    text = (old / "config.toml").read_text()
    assert 'estimator = "inversion_test"' in text and "\nlayers = 2\n" in text
    # the config.toml an older version wrote: both counts, the old estimator name
    text = text.replace('estimator = "inversion_test"', 'estimator = "compute_uncompute"')
    (old / "config.toml").write_text(text.replace("\nlayers = 2\n", "\nlayers = 2\nreps = 2\n"))
    manifest = json.loads((old / "manifest.json").read_text())
    manifest["artifacts"]["config.toml"] = artifacts.sha256_file(old / "config.toml")
    manifest[artifacts.MANIFEST_DIGEST] = artifacts.manifest_digest(manifest)
    (old / "manifest.json").write_text(json.dumps(manifest))
    code, out, err = run(["reproduce", old, "--json"], capsys)
    assert code == 0, err
    result = json.loads(out)
    assert result["identical"] and result["mapped_names"] == [
        "dropped old name encoding.reps (unused by the 'layered' encoding)",
        "mapped old name hardware.estimator = 'compute_uncompute' to 'inversion_test'"]
    code, out, err = run(["reproduce", old], capsys)
    assert code == 0 and "note: mapped old name hardware.estimator" in out, err


def test_old_iqp_repetitions_map_to_layers():
    from hilbertune.runs import _map_retired_names

    user = {"encoding": {"family": "iqp", "layers": 2, "reps": 3}}
    assert _map_retired_names(user) == ["mapped old name encoding.reps to encoding.layers"]
    assert user == {"encoding": {"family": "iqp", "layers": 3}}
    assert _map_retired_names({"encoding": {"family": "iqp", "layers": 2}}) == []


@pytest.mark.parametrize("setting, fragment", [
    ("training.steps=0", "positive"),
    ("training.learning_rate=-1", "positive"),
    ("evaluation.shots=0", "positive"),
    ("training.steps='many'", "must be int"),
    ("hardware.readout_error=1.5", "in [0, 1]"),
])
def test_bad_numbers_in_config_exit_2(small_csv, tmp_path, capsys, setting, fragment):
    code, _, err = run(["fit", "--data", small_csv, "--target", "kind", "--set", setting,
                        "--out", tmp_path / "o"], capsys)
    assert code == 2 and fragment in err and len(err.strip().splitlines()) == 1


def test_bad_toml_gives_the_line(tmp_path, capsys):
    config = tmp_path / "c.toml"
    config.write_text("[training]\nsteps = 3\nlearning_rate = = 0.1\n")
    code, _, err = run(["fit", config, "--out", tmp_path / "o"], capsys)
    assert code == 2 and "line 3" in err


def test_too_many_qubits_gives_the_memory_estimate(small_csv, tmp_path, capsys):
    code, _, err = run(["fit", "--data", small_csv, "--target", "kind", "--qubits", "30",
                        "--set", "encoding.family=layered", "--out", tmp_path / "o"], capsys)
    assert code == 2 and "GiB" in err and "fewer qubits" in err
    assert not (tmp_path / "o").exists()


def test_usage_errors_exit_2_in_one_line(capsys):
    code, _, err = run(["fit", "--qubits", "two"], capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1
    code, _, err = run(["frobnicate"], capsys)
    assert code == 2 and "invalid choice" in err


def test_console_script_runs_without_traceback(tmp_path):
    # the installed entry point, as a user runs it
    result = subprocess.run([sys.executable, "-m", "hilbertune.cli", "fit", "--data",
                             str(tmp_path / "nope.csv"), "--target", "y"],
                            capture_output=True, text=True, timeout=120)
    assert result.returncode == 2
    assert "does not exist" in result.stderr and "Traceback" not in result.stderr
