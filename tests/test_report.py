"""The report as a reader sees it: headline, plain sections, self-contained HTML.

Fixtures are hand-built run directories in the summary.json schema of issue 15 (selection,
Holm-corrected comparisons, timings) and in the older schema without them. Outside
references: numpy (mean, sample standard deviation), Python's html.parser, PNG signature
(PNG specification, W3C 2003: the 8 bytes 89 50 4E 47 0D 0A 1A 0A), matplotlib's PNG reader
and, when installed, headless Chromium.
"""

from __future__ import annotations

import base64
import copy
import io
import json
import re
import shutil
import subprocess
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from sklearn.metrics.pairwise import rbf_kernel

from hilbertune import artifacts, cli
from hilbertune.diagnostics import run_diagnostics
from hilbertune.errors import ArtifactError
from hilbertune.report import SECTIONS, build_report, headline, headline_lines, render

ALPHA = 0.05


def _comparison(a, b, mean, p, p_holm):
    return {"test": "corrected resampled t-test (Nadeau & Bengio 2003)", "n_repeats": 5,
            "mean_difference": mean, "t_statistic": None if p is None else 1.5, "dof": 4,
            "p_value": p, "p_holm": p_holm,
            "significant": bool(p_holm is not None and p_holm < ALPHA),
            "verdict": "(written by the fit)", "a": a, "b": b}


def new_summary(kernels, *, learning=(0.06, 0.004, 0.012), rbf=(0.02, 0.3, 0.6),
                linear=(0.2, 0.001, 0.003)):
    """A summary in the new schema; (mean difference, p, p_holm) per comparison."""
    k0, k1, kc, y = (kernels["train_initial"], kernels["train_final"], kernels["train_rbf"],
                     kernels["y_train"])
    diagnostics, _ = run_diagnostics(k0, k1, kc, y, 3, shots=1000)
    per_repeat = {"quantum": [0.80, 0.85, 0.90, 0.83, 0.87],
                  "untrained": [0.75, 0.78, 0.84, 0.80, 0.79],
                  "rbf_svm": [0.79, 0.86, 0.85, 0.80, 0.84],
                  "linear_svm": [0.60, 0.65, 0.70, 0.62, 0.66],
                  "majority_class": [0.54, 0.54, 0.55, 0.54, 0.54]}
    curve = [{"shots": s, "test_accuracy_mean": 0.7 + 0.03 * i, "test_accuracy_std": 0.02,
              "alignment_mean": 0.2, "alignment_std": 0.01, "relative_gram_error_mean": 0.1,
              "repair_relative_change_mean": 0.0, "total_executions": 645 * s}
             for i, s in enumerate((64, 256, 1024, 4096))]
    noisy = [dict(p, test_accuracy_mean=p["test_accuracy_mean"] - 0.05) for p in curve]
    return {
        "format_version": 1, "n_qubits": 3, "seed": 0, "objective": "centered_alignment",
        "train_accuracy": 0.95, "test_accuracy": 0.86, "untrained_test_accuracy": 0.79,
        "alignment": {"initial": 0.1, "final": 0.3, "centered_initial": 0.12,
                      "centered_final": 0.35},
        "svm": {"C": 1.0, "tuned_by_cv": True},
        "baselines": {"rbf_svm": {"name": "rbf_svm", "test_accuracy": 0.84,
                                  "train_accuracy": 0.9, "cv_accuracy": 0.85,
                                  "best_params": {"C": 10.0, "gamma": 0.1}, "cv_folds": 5},
                      "linear_svm": {"name": "linear_svm", "test_accuracy": 0.64,
                                     "train_accuracy": 0.66, "cv_accuracy": 0.63,
                                     "best_params": {"C": 1.0}, "cv_folds": 5},
                      "untrained_quantum": {"test_accuracy": 0.79},
                      "majority_class": {"test_accuracy": 0.54}},
        "significance": {
            "test": "corrected resampled t-test (Nadeau & Bengio 2003)",
            "correction": "Holm (1979) step-down over the 3 comparisons", "alpha": ALPHA,
            "baseline": "tuned RBF SVM", "mean_difference": rbf[0], "t_statistic": 0.4,
            "dof": 4, "p_value": rbf[1], "p_holm": rbf[2], "verdict": "(fit)",
            "learning_verdict": "(fit)", "caveat": "(fit)",
            "comparisons": {
                "learned_vs_untrained": _comparison("the chosen kernel",
                                                    "the untrained quantum kernel", *learning),
                "quantum_vs_rbf_svm": _comparison("the chosen quantum kernel",
                                                  "the tuned RBF SVM", *rbf),
                "quantum_vs_linear_svm": _comparison("the chosen quantum kernel",
                                                     "the linear SVM", *linear)},
            "repeats": 5, "split_seeds": [0, 1, 2, 3, 4], "n_train": 30, "n_test": 13,
            "chosen_per_repeat": ["full"] * 5, "per_repeat": per_repeat},
        "selection": {
            "rule": "one-standard-error rule (Hastie, Tibshirani & Friedman 2009, 7.10)",
            "folds": 3, "best": "full", "chosen": "full",
            "reason": "highest inner-CV accuracy; no simpler candidate within one standard "
                      "error",
            "cv_accuracy": 0.86, "cv_accuracy_sd": 0.04, "note": "inner CV on training rows",
            "candidates": [
                {"name": "untrained", "scope": "untrained", "objective": None, "steps": 0,
                 "description": "nothing trained", "trainable_parameters": 0,
                 "cv_accuracy_mean": 0.71, "cv_accuracy_sd": 0.05, "cv_accuracy_se": 0.03,
                 "cv_accuracy_folds": [0.7, 0.66, 0.77], "alignment": 0.1},
                {"name": "bandwidth", "scope": "bandwidth", "objective": "centered_alignment",
                 "steps": 60, "description": "bandwidth only", "trainable_parameters": 1,
                 "cv_accuracy_mean": 0.78, "cv_accuracy_sd": 0.03, "cv_accuracy_se": 0.02,
                 "cv_accuracy_folds": [0.75, 0.8, 0.79], "alignment": 0.2},
                {"name": "full", "scope": "full", "objective": "centered_alignment",
                 "steps": 60, "description": "all weights, biases and the bandwidth",
                 "trainable_parameters": 19, "cv_accuracy_mean": 0.861,
                 "cv_accuracy_sd": 0.04, "cv_accuracy_se": 0.023,
                 "cv_accuracy_folds": [0.82, 0.9, 0.86], "alignment": 0.3,
                 "cv_gain_over_untrained": 0.15, "cv_gain_over_untrained_se": 0.021}]},
        "timings": {"selection": 3.2, "evaluation": 1.1, "repeated_splits": 9.5},
        "diagnostics": diagnostics,
        "dataset": {"source": "hand-built test data", "invented": True, "n_samples": 43,
                    "n_features_raw": 2, "n_features": 2, "classes": ["a", "b"],
                    "train_size": 30, "test_size": 13, "test_fraction": 0.3},
        "encoding": {"family": "layered", "kind": "fidelity"},
        "circuit": {"qubits": 3, "depth": 6, "one_qubit_gates": 12, "two_qubit_gates": 3,
                    "trainable_parameters": 19},
        "training": {"steps_run": 20, "stop_reason": "step limit", "best_step": 19,
                     "bandwidth_initial": 0.5, "bandwidth_final": 0.7, "wall_time_s": 1.0},
        "hardware": {"estimator": "inversion_test", "kind": "fidelity", "shot_budget": {
            "estimator": "inversion_test", "circuits_per_entry": 1, "repair": "clip",
            "repeats": 5, "tolerance": 0.02, "C": 1.0,
            "exact": {"test_accuracy": 0.8, "alignment": 0.3}, "curve": curve,
            "empirical_shots": 1024, "analytic_shots": 700, "analytic_rule": "rule text",
            "entries": {"train": 435, "prediction": 390}, "qubits_per_circuit": 3,
            "total_executions": {"empirical": 645 * 1024, "analytic": 645 * 700}},
            "device_noise": {"model": "global depolarizing", "p_from": "gate counts",
                             "one_qubit_error": 0.001, "two_qubit_error": 0.01,
                             "readout_error": 0.0, "depolarizing_probability": 0.08,
                             "empirical_shots_with_noise": 4096,
                             "test_accuracy_at_most_shots": 0.74, "curve": noisy}},
        "cautions": ["All quantum kernels here were simulated exactly on a classical computer; "
                     "a simulated kernel is no evidence about quantum hardware."],
        "versions": {"hilbertune": "test"}, "wall_time_s": 12.0,
    }


def old_summary(summary):
    """The same run in the schema before issue 15 (no selection, one uncorrected test)."""
    old = copy.deepcopy(summary)
    del old["selection"], old["timings"]
    sig = old["significance"]
    for key in ("comparisons", "correction", "p_holm", "learning_verdict",
                "chosen_per_repeat", "n_train", "n_test"):
        sig.pop(key)
    sig["per_repeat"].pop("untrained")
    sig["per_repeat"].pop("majority_class")
    old["baselines"].pop("majority_class")
    geo = old["diagnostics"]["geometric_difference"]
    for key in ("curves", "classical_gram", "lambda_rule"):
        geo.pop(key)
    old["diagnostics"]["effective_dimension"] = {"initial": 3.0, "final": 2.5, "rbf": 1.1}
    return old


@pytest.fixture(scope="module")
def kernels():
    rng = np.random.default_rng(5)
    X = rng.normal(size=(30, 2))
    y = (X[:, 0] + 0.3 * rng.normal(size=30) > 0).astype(np.int64)
    order = np.argsort(y, kind="stable")
    grid = np.linspace(-2, 2, 20)
    return {"train_initial": rbf_kernel(X, gamma=0.3), "train_final": rbf_kernel(X, gamma=2.0),
            "train_rbf": rbf_kernel(X, gamma=0.1), "y_train": y,
            "y_test": y[:13], "spectrum_initial": np.linalg.eigvalsh(rbf_kernel(X))[::-1],
            "spectrum_final": np.linalg.eigvalsh(rbf_kernel(X, gamma=2.0))[::-1],
            "spectrum_rbf": np.linalg.eigvalsh(rbf_kernel(X, gamma=0.1))[::-1],
            "boundary_x": grid, "boundary_y": grid,
            "boundary_grid": np.sign(grid[None, :] + 0 * grid[:, None]),
            "X_train": X, "X_test": X[:13], "order": order}


def make_run(path: Path, summary: dict, kernels: dict) -> Path:
    path.mkdir(parents=True, exist_ok=True)
    artifacts.write_json(path / "summary.json", summary)
    artifacts.write_npz(path / "kernels.npz", {k: v for k, v in kernels.items()
                                               if k != "order"})
    rows = [{"step": i, "objective": -0.1 * i, "alignment": 0.01 * i,
             "validation_objective": -0.09 * i, "grad_norm": 1.0, "learning_rate": 0.05}
            for i in range(20)]
    artifacts.write_csv_rows(path / "history.csv", rows, list(rows[0]))
    build_report(path)
    artifacts.write_manifest(path, seed=0, data_sha256="0" * 64,
                             artifacts=["summary.json", "kernels.npz", "history.csv",
                                        "report.html"])
    return path


@pytest.fixture(scope="module")
def new_run(tmp_path_factory, kernels):
    return make_run(tmp_path_factory.mktemp("new") / "run", new_summary(kernels), kernels)


# --------------------------------------------------------------------------- headline

def test_headline_numbers_come_from_the_summary(kernels):
    summary = new_summary(kernels)
    head = headline(summary)
    json.dumps(head, allow_nan=False)
    assert head["test_accuracy"] == {"chosen": 0.86, "untrained": 0.79, "rbf_svm": 0.84,
                                     "linear_svm": 0.64, "majority_class": 0.54}
    for key, source in (("chosen", "quantum"), ("untrained", "untrained"),
                        ("rbf_svm", "rbf_svm"), ("linear_svm", "linear_svm"),
                        ("majority_class", "majority_class")):
        values = summary["significance"]["per_repeat"][source]
        # numpy: mean and sample standard deviation (ddof=1)
        assert head["repeated_splits"][key]["mean"] == pytest.approx(np.mean(values))
        assert head["repeated_splits"][key]["sd"] == pytest.approx(np.std(values, ddof=1))
    assert head["test"].startswith("corrected resampled t-test")
    assert head["correction"].startswith("Holm (1979)")
    assert [t["comparison"] for t in head["tests"]] == [
        "learned_vs_untrained", "quantum_vs_rbf_svm", "quantum_vs_linear_svm"]
    assert head["chosen_kernel"] == "full"
    hw = head["hardware"]
    assert hw["shots"] == 1024 and hw["total_executions"] == 645 * 1024
    # with device noise: 4096 shots, executions looked up on the noisy curve
    assert hw["shots_with_noise"] == 4096 and hw["total_executions_with_noise"] == 645 * 4096
    assert hw["distinct_circuits"] == 435 + 390
    assert head["concentration"]["concentrated"] is False


@pytest.mark.parametrize("learning, rbf, linear, words", [
    ((0.06, 0.004, 0.012), (0.02, 0.3, 0.6), (0.2, 0.001, 0.003),
     ["Learning helped", "not significantly different from the tuned RBF SVM",
      "significantly more accurate than the linear SVM"]),
    ((0.01, 0.4, 0.8), (-0.1, 0.001, 0.003), (0.01, 0.5, 0.8),
     ["Not shown: the chosen kernel is 1.0 points more accurate than the untrained one on "
      "average, but the difference is within the split-to-split noise",
      "significantly less accurate than the tuned RBF SVM"]),
    ((-0.01, 0.4, 0.8), (-0.1, 0.001, 0.003), (0.01, 0.5, 0.8),
     ["Learning did not help: the chosen kernel is not more accurate than the untrained"]),
    ((-0.1, 0.001, 0.003), (0.1, None, None), (0.1, 0.04, 0.08),
     ["Learning hurt: the chosen kernel is significantly less accurate than the untrained",
      "not significantly different from the tuned RBF SVM (+0.100, Holm-adjusted p = n/a",
      "not significantly different from the linear SVM"]),
])
def test_verdicts_follow_the_corrected_tests(kernels, learning, rbf, linear, words):
    head = headline(new_summary(kernels, learning=learning, rbf=rbf, linear=linear))
    text = head["learning_verdict"] + " " + head["classical_verdict"]
    for word in words:
        assert word in text
    assert "no evidence about quantum hardware" in head["classical_verdict"]


@pytest.mark.parametrize("mean", [-0.2, 0.0, 0.05, 0.3])
@pytest.mark.parametrize("p_holm", [None, 0.001, 0.049, 0.05, 0.6])
def test_quantum_is_called_more_accurate_only_when_significant_and_positive(kernels, mean,
                                                                            p_holm):
    head = headline(new_summary(kernels, rbf=(mean, p_holm, p_holm),
                                linear=(mean, p_holm, p_holm)))
    better = "significantly more accurate than the tuned RBF SVM" in head["classical_verdict"]
    assert better == (p_holm is not None and p_holm < ALPHA and mean > 0)


def test_learning_verdict_counts_the_splits_that_replaced_the_untrained_kernel(kernels):
    summary = new_summary(kernels, learning=(0.02, 0.3, 0.6))
    summary["significance"]["chosen_per_repeat"] = ["full", "untrained", "rescaled x0.5",
                                                    "untrained", "full"]
    assert headline(summary)["learning_verdict"].endswith(
        "Inner cross-validation replaced the untrained kernel on 3 of 5 splits.")
    del summary["significance"]["chosen_per_repeat"]  # older runs: no count, no error
    assert "replaced the untrained" not in headline(summary)["learning_verdict"]


def test_selection_of_the_untrained_kernel_says_learning_did_not_help(kernels):
    summary = new_summary(kernels, learning=(0.0, 1.0, 1.0))
    summary["selection"]["chosen"] = "untrained"
    head = headline(summary)
    assert head["learning_verdict"].startswith("Learning did not help: inner cross-validation "
                                               "chose the untrained kernel")


def test_headline_of_an_older_summary_says_what_was_not_tested(kernels):
    head = headline(old_summary(new_summary(kernels)))
    json.dumps(head, allow_nan=False)
    assert head["learning_verdict"].startswith("Not tested")
    assert "not tested against the linear SVM" in head["classical_verdict"]
    assert head["correction"].startswith("none")
    assert head["repeated_splits"]["untrained"] is None
    assert head["chosen_kernel"].startswith("learned")
    # no reference row where the run did not record it
    assert head["test_accuracy"]["majority_class"] is None
    assert "most common class" not in "\n".join(headline_lines(head))
    assert "most common class" in "\n".join(headline_lines(headline(new_summary(kernels))))
    assert headline(old_summary(new_summary(kernels)) | {"hardware": None})["hardware"][
        "available"] is False


def test_headline_lines_for_the_terminal(kernels):
    lines = headline_lines(headline(new_summary(kernels)))
    assert lines[0].startswith("Headline") and "no evidence about quantum hardware" in lines[0]
    text = "\n".join(lines)
    for fragment in ("chosen quantum kernel 0.860", "tuned RBF SVM 0.840", "linear SVM 0.640",
                     "mean +- sd over 5 splits", "Learning helped", "Holm (1979)",
                     "1024 shots per circuit (one kernel entry)", "660,480 circuit executions",
                     "with device noise 4096 shots, 2.64 million executions"):
        assert fragment in text, fragment
    assert len(lines) <= 10 and all(isinstance(line, str) for line in lines)


# --------------------------------------------------------------------------- the HTML page

class _Page(HTMLParser):
    """Balanced tags, ids, every src/href, every table row's first cell, section intros."""

    VOID = {"meta", "img", "br", "link", "input", "hr"}

    def __init__(self):
        super().__init__()
        self.stack, self.ids, self.refs, self.first_cells, self.order = [], [], [], [], []
        self._row_cells, self._cell = None, None
        self.intros = {}
        self._section = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if "id" in attrs:
            self.ids.append(attrs["id"])
            self.order.append(attrs["id"])
        if tag == "section":
            self._section = attrs.get("id")
        if tag == "p" and "intro" in (attrs.get("class") or "") and self._section:
            self.intros[self._section] = True
        for key in ("src", "href"):
            if key in attrs:
                self.refs.append(attrs[key])
        if tag == "tr":
            self._row_cells = []
        if tag in ("td", "th") and self._row_cells is not None:
            self._cell = []
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)

    def handle_endtag(self, tag):
        assert self.stack and self.stack[-1] == tag, f"unbalanced </{tag}>"
        self.stack.pop()
        if tag in ("td", "th") and self._cell is not None:
            self._row_cells.append("".join(self._cell))
            self._cell = None
        if tag == "tr" and self._row_cells:
            self.first_cells.append(self._row_cells[0])
            self._row_cells = None


def _parse(text):
    page = _Page()
    page.feed(text)
    page.close()
    assert not page.stack, f"unclosed tags {page.stack}"
    return page


def test_report_parses_is_self_contained_and_every_image_loads(new_run):
    import matplotlib.image

    text = (new_run / "report.html").read_text(encoding="utf-8")
    page = _parse(text)
    assert len(page.ids) == len(set(page.ids))
    assert {key for key, _ in SECTIONS} <= set(page.ids)
    images = [r for r in page.refs if r.startswith("data:image/png;base64,")]
    # nothing on the network or on disk: only embedded images and in-page anchors
    assert all(r.startswith("data:image/png;base64,") or r.startswith("#") for r in page.refs)
    assert not re.search(r"(https?:)?//[a-z0-9.-]+\.[a-z]{2,}/", text.split("<script")[0])
    assert "@import" not in text and "url(" not in text
    assert len(images) >= 5  # learning, kernels, spectra, hardware, boundary
    for ref in images:
        data = base64.b64decode(ref.split(",", 1)[1], validate=True)
        assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
        pixels = matplotlib.image.imread(io.BytesIO(data), format="png")
        assert pixels.shape[0] > 50 and pixels.shape[1] > 50
    for href in (r for r in page.refs if r.startswith("#")):
        assert href[1:] in page.ids


def test_caution_then_headline_then_sections_with_plain_labels(new_run):
    text = (new_run / "report.html").read_text(encoding="utf-8")
    caution = text.index("were <b>simulated</b>")
    panel = text.index("id='headline'")
    nav = text.index("<nav>")
    assert text.index("<h1>") < caution < panel < nav
    page = _parse(text)
    assert page.order.index("headline") < page.order.index("overview")
    for key, _ in SECTIONS:
        assert page.intros.get(key), f"section {key} has no introduction"
    # plain labels: no raw summary key (snake_case) as a row label
    raw = [cell for cell in page.first_cells if re.fullmatch(r"[a-z]+(_[a-z]+)+", cell.strip())]
    assert raw == [], raw
    for key in ("mean_offdiagonal", "analytic_rule", "p_from", "spread_to_noise"):
        assert key not in " ".join(page.first_cells)


def test_selection_section_lists_candidates_and_the_choice(new_run):
    text = (new_run / "report.html").read_text(encoding="utf-8")
    section = text[text.index('<section id="selection">'):text.index('<section id="accuracy">')]
    for name, mean, sd in (("untrained", "0.71", "0.05"), ("bandwidth", "0.78", "0.03"),
                           ("full", "0.861", "0.04")):
        assert f"<td>{name}</td>" in section
        assert f"{mean} ± {sd}" in section
    assert section.count("<td>chosen</td>") == 1
    assert "Chosen: full" in section and "one-standard-error" in section
    # the paired gain over the untrained encoding, when the run recorded it
    assert "gain over untrained, same folds" in section and "+0.150 ± 0.021" in section


def test_hardware_table_has_one_row_per_shot_count(new_run):
    text = (new_run / "report.html").read_text(encoding="utf-8")
    section = text[text.index('<section id="hardware">'):text.index('<section id="boundary">')]
    for shots in (64, 256, 1024, 4096):
        assert f"<tr><td>{shots}</td>" in section
        assert f"{645 * shots:,}" in section
    assert "0.700 ± 0.020" in section and "0.650 ± 0.020" in section  # without / with noise
    assert "shot noise and device noise" in section


def test_health_section_shows_the_lambda_curve_and_centered_dimension(new_run, kernels):
    text = (new_run / "report.html").read_text(encoding="utf-8")
    section = text[text.index('<section id="health">'):text.index('<section id="circuit">')]
    summary = json.loads((new_run / "summary.json").read_text())
    geo = summary["diagnostics"]["geometric_difference"]
    assert f"{geo['regularizer']:g} (chosen)" in section
    assert section.count("(chosen)") == 1
    assert len(geo["curves"]["learned_vs_rbf"]["curve"]) == section.count("<tr><td>1e-") + \
        section.count("<tr><td>0.") + section.count("<tr><td>1</td>") + \
        section.count("<tr><td>1 (chosen)")
    assert "centered Gram HKH" in section


def test_older_summary_still_renders(kernels, tmp_path):
    run_dir = make_run(tmp_path / "old", old_summary(new_summary(kernels)), kernels)
    text = (run_dir / "report.html").read_text(encoding="utf-8")
    _parse(text)
    assert "no record of kernel selection" in text
    assert "Not tested" in text and "one value only" in text


# --------------------------------------------------------------------------- bad input

def _run_cli(args, capsys):
    code = cli.main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.mark.parametrize("damage, fragment", [
    (lambda d: (d / "kernels.npz").unlink(), "kernels.npz"),
    (lambda d: (d / "history.csv").unlink(), "history.csv"),
])
def test_missing_artifacts_are_named_and_nothing_is_written(kernels, tmp_path, damage,
                                                            fragment):
    run_dir = make_run(tmp_path / "run", new_summary(kernels), kernels)
    before = (run_dir / "report.html").read_bytes()
    damage(run_dir)
    with pytest.raises(ArtifactError, match=fragment):
        build_report(run_dir)
    assert (run_dir / "report.html").read_bytes() == before


def test_report_command_on_an_older_format_exits_2_with_one_line(kernels, tmp_path, capsys):
    summary = new_summary(kernels)
    del summary["significance"], summary["baselines"]["linear_svm"]
    run_dir = tmp_path / "older"
    run_dir.mkdir()
    artifacts.write_json(run_dir / "summary.json", summary)
    artifacts.write_npz(run_dir / "kernels.npz", {"y_train": kernels["y_train"]})
    artifacts.write_csv_rows(run_dir / "history.csv", [{"step": 0}], ["step"])
    artifacts.write_text(run_dir / "report.html", "old report")
    artifacts.write_manifest(run_dir, seed=0, data_sha256="0" * 64,
                             artifacts=["summary.json", "kernels.npz", "history.csv",
                                        "report.html"])
    code, _, err = _run_cli(["report", run_dir], capsys)
    assert code == 2
    assert len(err.strip().splitlines()) == 1 and err.startswith("hilbertune: error:")
    # the command checks the whole run first (as predict and export do): it names the
    # artifacts the manifest does not cover; build_report's own check of the summary keys
    # is tested above (test_missing_artifacts_are_named_and_nothing_is_written)
    assert "config.toml" in err and "params.npz" in err
    assert (run_dir / "report.html").read_text() == "old report"


# --------------------------------------------------------------------------- in a browser

def _chromium():
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


_MEASURE = """<script>
window.addEventListener('load', function () {
  var h = document.getElementById('headline').getBoundingClientRect();
  var out = document.createElement('pre');
  out.id = 'measured';
  var broken = Array.from(document.images).filter(function (i) {
    return !(i.complete && i.naturalWidth > 0); }).length;
  out.textContent = JSON.stringify({height: document.documentElement.scrollHeight,
    headline_top: h.top, headline_bottom: h.bottom, images: document.images.length,
    broken: broken, width: document.documentElement.scrollWidth});
  document.body.appendChild(out);
});
</script>"""


def test_report_in_headless_chromium(new_run, tmp_path):
    browser = _chromium()
    if browser is None:
        print("skipped: no chromium on PATH (Debian: apt-get install chromium)")
        pytest.skip("headless Chromium is not installed (Debian package `chromium`)")
    text = (new_run / "report.html").read_text(encoding="utf-8")
    page = tmp_path / "measured.html"
    page.write_text(text.replace("</body>", _MEASURE + "</body>"), encoding="utf-8")
    flags = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
             "--no-first-run", "--disable-background-networking",
             "--disable-component-update", "--disable-sync",
             f"--user-data-dir={tempfile.mkdtemp(dir=tmp_path)}", "--window-size=1280,900"]
    dom = subprocess.run(flags + ["--virtual-time-budget=5000", "--dump-dom",
                                  page.as_uri()], capture_output=True, text=True, timeout=120)
    found = re.search(r'<pre id="measured">(.*?)</pre>', dom.stdout)
    assert found, dom.stderr[-2000:]
    measured = json.loads(found.group(1).replace("&quot;", '"'))
    # the headline is entirely within the first screen of a 1280 x 900 window
    assert 0 < measured["headline_top"] < measured["headline_bottom"] <= 900, measured
    # every image decoded, nothing wider than the window, a page of sane length
    assert measured["images"] >= 5 and measured["broken"] == 0, measured
    assert measured["width"] <= 1280, measured
    assert 3000 < measured["height"] < 20000, measured
    shot = tmp_path / "first_screen.png"
    subprocess.run(flags + [f"--screenshot={shot}", (new_run / "report.html").as_uri()],
                   capture_output=True, timeout=120)
    assert shot.exists() and shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    keep = Path(tempfile.gettempdir()) / "hilbertune_report_first_screen.png"
    shutil.copyfile(shot, keep)


def reduced_summary(kernels, rbf_all=(-0.12, 0.004, 0.008), linear_all=(-0.02, 0.6, 0.6)):
    """new_summary of a run whose encoding saw 2 principal components of 30 inputs."""
    summary = new_summary(kernels)
    summary["dataset"].update(n_features_raw=30, n_features=2, reduction="pca")
    summary["baselines"]["rbf_svm_all_features"] = {
        "name": "rbf_svm", "test_accuracy": 0.97, "train_accuracy": 1.0, "cv_accuracy": 0.95,
        "best_params": {"C": 10.0, "gamma": 0.003}, "cv_folds": 5}
    summary["baselines"]["linear_svm_all_features"] = {
        "name": "linear_svm", "test_accuracy": 0.88, "train_accuracy": 0.9,
        "cv_accuracy": 0.87, "best_params": {"C": 1.0}, "cv_folds": 5}
    sig = summary["significance"]
    sig["per_repeat"]["rbf_svm_all_features"] = [0.95, 0.97, 0.96, 0.98, 0.96]
    sig["per_repeat"]["linear_svm_all_features"] = [0.86, 0.88, 0.87, 0.85, 0.86]
    sig["all_features"] = {
        "correction": "Holm (1979) step-down over these 2 comparisons",
        "comparisons": {
            "quantum_vs_rbf_svm_all_features": _comparison(
                "the chosen quantum kernel", "the tuned RBF SVM on all input features",
                *rbf_all),
            "quantum_vs_linear_svm_all_features": _comparison(
                "the chosen quantum kernel", "the linear SVM on all input features",
                *linear_all)}}
    return summary


def test_headline_says_what_the_reduction_costs_and_only_when_features_were_reduced(
        kernels, tmp_path):
    head = headline(reduced_summary(kernels))
    full = head["all_features"]
    assert full["features_seen"] == 2 and full["features_total"] == 30
    assert full["repeated_splits"]["rbf_svm_all_features"]["mean"] == pytest.approx(0.964)
    assert "2 principal components of the 30 input features" in full["verdict"]
    assert "significantly less accurate than the tuned RBF SVM on all input features" in \
        full["verdict"]
    assert "not significantly different from the linear SVM on all input features" in \
        full["verdict"]
    assert "more qubits" in full["verdict"]  # a significant loss names the fix
    even = headline(reduced_summary(kernels, rbf_all=(-0.01, 0.5, 0.9)))["all_features"]
    assert "more qubits" not in even["verdict"]
    lines = "\n".join(headline_lines(head))
    assert "all input features:" in lines and "0.964 +- " in lines
    assert headline(new_summary(kernels))["all_features"] is None  # nothing reduced
    html = (make_run(tmp_path / "run", reduced_summary(kernels), kernels)
            / "report.html").read_text()
    headline_html = html[html.index("id='headline'"):html.index("</section>",
                                                                 html.index("id='headline'"))]
    assert "What the reduction costs" in headline_html
    assert "tuned RBF SVM, all input features (30)" in headline_html
