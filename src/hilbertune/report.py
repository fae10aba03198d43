"""Training report: one self-contained HTML page built from a run directory's artifacts.

Last stage of the data flow. It reads only ``summary.json``, ``history.csv`` and
``kernels.npz`` (so ``hilbertune report RUN_DIR`` can rebuild it at any time), draws with
matplotlib, embeds every image as base64 and references nothing on the network.
"""

from __future__ import annotations

import base64
import csv
import html
import io
import json
from pathlib import Path

import numpy as np

SECTIONS = [
    ("overview", "Run overview"),
    ("learning", "Learning curves"),
    ("accuracy", "Accuracy against classical baselines"),
    ("kernels", "Kernel matrices before and after training"),
    ("spectra", "Eigenvalue spectra"),
    ("health", "Concentration and geometry"),
    ("circuit", "Circuit summary"),
    ("hardware", "Hardware cost estimate"),
    ("boundary", "Decision boundary"),
    ("cautions", "Cautions"),
]

_STYLE = """
body{font-family:system-ui,-apple-system,Segoe UI,sans-serif;max-width:1000px;margin:2em auto;
padding:0 1em;color:#222;line-height:1.45}
h1{font-size:1.6em}h2{border-bottom:1px solid #ccc;padding-bottom:.2em;margin-top:1.8em}
table{border-collapse:collapse;margin:.6em 0}td,th{border:1px solid #ccc;padding:.3em .6em;
text-align:left}th{background:#f3f3f3}.notice{background:#fff4d6;border:1px solid #e0b84c;
padding:.6em 1em;border-radius:4px}.verdict{font-weight:600}img{max-width:100%}
code{background:#f3f3f3;padding:0 .2em}
"""


def _figure_to_img(fig, alt: str) -> str:
    import matplotlib.pyplot as plt

    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=90, bbox_inches="tight")
    plt.close(fig)
    data = base64.b64encode(buffer.getvalue()).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


def _fmt(value, digits=4) -> str:
    if value is None:
        return "n/a"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return f"{value:.{digits}g}"
    return html.escape(str(value))


def _table(rows, header=None) -> str:
    out = ["<table>"]
    if header:
        out.append("<tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in header) + "</tr>")
    for row in rows:
        out.append("<tr>" + "".join(f"<td>{_fmt(c)}</td>" for c in row) + "</tr>")
    out.append("</table>")
    return "".join(out)


def read_history(path) -> dict:
    """history.csv as a dict of float columns."""
    columns: dict = {}
    with open(path, newline="", encoding="utf-8") as handle:
        for row in csv.DictReader(handle):
            for key, value in row.items():
                try:
                    columns.setdefault(key, []).append(float(value))
                except (TypeError, ValueError):
                    columns.setdefault(key, []).append(float("nan"))
    return {k: np.asarray(v) for k, v in columns.items()}


def _learning_section(history: dict) -> str:
    if not history or "step" not in history:
        return "<p>No training history was recorded.</p>"
    plt = _pyplot()
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.4))
    steps = history["step"]
    axes[0].plot(steps, history.get("objective", np.full_like(steps, np.nan)), label="training")
    if "validation_objective" in history:
        axes[0].plot(steps, history["validation_objective"], label="validation")
    axes[0].set_xlabel("step")
    axes[0].set_ylabel("objective (minimized)")
    axes[0].legend()
    if "alignment" in history:
        axes[1].plot(steps, history["alignment"], color="tab:green")
    axes[1].set_xlabel("step")
    axes[1].set_ylabel("alignment on the training batch")
    return _figure_to_img(fig, "objective and alignment per step")


def _class_order(labels):
    return np.argsort(labels, kind="stable")


def _kernel_section(kernels: dict) -> str:
    names = [("initial", "untrained encoding"), ("final", "learned encoding"),
             ("rbf", "tuned RBF (classical)")]
    present = [(k, t) for k, t in names if f"train_{k}" in kernels]
    if not present:
        return "<p>No kernel matrices were stored.</p>"
    plt = _pyplot()
    order = _class_order(kernels["y_train"])
    fig, axes = plt.subplots(1, len(present), figsize=(4 * len(present), 3.6))
    axes = np.atleast_1d(axes)
    for ax, (key, title) in zip(axes, present):
        gram = kernels[f"train_{key}"][np.ix_(order, order)]
        image = ax.imshow(gram, vmin=0, vmax=1, cmap="viridis")
        ax.set_title(title)
        ax.set_xticks([])
        ax.set_yticks([])
    fig.colorbar(image, ax=list(axes), shrink=0.8)
    return ("<p>Training Gram matrices with rows and columns ordered by class: a good kernel "
            "shows bright blocks on the diagonal.</p>" +
            _figure_to_img(fig, "kernel heatmaps ordered by class"))


def _spectra_section(kernels: dict) -> str:
    keys = [k for k in ("initial", "final", "rbf") if f"spectrum_{k}" in kernels]
    if not keys:
        return "<p>No spectra were stored.</p>"
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6, 3.4))
    for key in keys:
        values = np.clip(kernels[f"spectrum_{key}"], 1e-12, None)
        ax.semilogy(np.arange(1, len(values) + 1), values / values.sum(), label=key)
    ax.set_xlabel("eigenvalue index")
    ax.set_ylabel("eigenvalue / trace")
    ax.legend()
    return _figure_to_img(fig, "kernel eigenvalue spectra")


def _boundary_section(kernels: dict, summary: dict) -> str:
    if "boundary_grid" not in kernels:
        return ("<p>Drawn only for data with two features after preprocessing; this run has "
                f"{summary.get('dataset', {}).get('n_features', '?')}.</p>")
    plt = _pyplot()
    grid = kernels["boundary_grid"]
    xs, ys = kernels["boundary_x"], kernels["boundary_y"]
    fig, ax = plt.subplots(figsize=(5, 4.2))
    ax.contourf(xs, ys, grid, alpha=0.3, cmap="coolwarm")
    for name, marker in (("train", "o"), ("test", "^")):
        if f"X_{name}" in kernels:
            pts, lab = kernels[f"X_{name}"], kernels[f"y_{name}"]
            ax.scatter(pts[:, 0], pts[:, 1], c=lab, cmap="coolwarm", marker=marker,
                       edgecolors="k", s=22, label=name)
    ax.set_xlabel("feature 1 (scaled)")
    ax.set_ylabel("feature 2 (scaled)")
    ax.legend()
    return _figure_to_img(fig, "decision boundary of the learned kernel SVM")


def _hardware_section(summary: dict) -> str:
    hw = summary.get("hardware")
    if not hw:
        return "<p>Hardware estimate was switched off for this run (hardware.enabled).</p>"
    parts = []
    resources = summary.get("circuit", {})
    budget = hw.get("shot_budget", {})
    if budget.get("curve"):
        plt = _pyplot()
        curve = budget["curve"]
        shots = [row["shots"] for row in curve]
        fig, ax = plt.subplots(figsize=(6, 3.4))
        ax.errorbar(shots, [row["test_accuracy_mean"] for row in curve],
                    yerr=[row["test_accuracy_std"] for row in curve], fmt="o-",
                    label="finite shots")
        noisy = hw.get("device_noise", {}).get("curve")
        if noisy:
            ax.errorbar([row["shots"] for row in noisy],
                        [row["test_accuracy_mean"] for row in noisy],
                        yerr=[row["test_accuracy_std"] for row in noisy], fmt="s--",
                        label="finite shots + gate noise")
        exact = budget.get("exact", {}).get("test_accuracy")
        if exact is not None:
            ax.axhline(exact, color="k", ls=":", label="exact kernel")
        ax.set_xscale("log")
        ax.set_xlabel("shots per kernel entry")
        ax.set_ylabel("test accuracy")
        ax.legend()
        parts.append(_figure_to_img(fig, "test accuracy against shots"))
    rows = [(k, v) for k, v in hw.items() if not isinstance(v, (dict, list))]
    rows += [(f"shot budget: {k}", v) for k, v in budget.items()
             if not isinstance(v, (dict, list))]
    rows += [(f"circuit executions ({k} shot count)", v)
             for k, v in budget.get("total_executions", {}).items()]
    rows += [(f"kernel entries to estimate ({k})", v)
             for k, v in budget.get("entries", {}).items()]
    noise = hw.get("device_noise", {})
    rows += [(f"device noise: {k}", v) for k, v in noise.items()
             if not isinstance(v, (dict, list))]
    rows += [(f"circuit: {k}", v) for k, v in resources.items() if not isinstance(v, dict)]
    parts.append(_table(rows, ["quantity", "value"]))
    return "".join(parts)


def render(summary: dict, history: dict, kernels: dict) -> str:
    """The whole report as an HTML string."""
    ds = summary.get("dataset", {})
    body = [f"<h1>hilbertune training report</h1>"]
    if ds.get("invented"):
        body.append('<p class="notice">The data in this run are <b>invented</b>: generated by '
                    "hilbertune's own demo generator for illustration. They describe no real "
                    "system.</p>")
    body.append('<p class="notice">All quantum kernels here were <b>simulated</b> exactly on a '
                "classical computer. A simulated kernel is no evidence about how the same "
                "circuit behaves on quantum hardware.</p>")
    body.append("<nav><ul>" + "".join(f'<li><a href="#{k}">{t}</a></li>' for k, t in SECTIONS)
                + "</ul></nav>")

    def section(key, content):
        title = dict(SECTIONS)[key]
        body.append(f'<section id="{key}"><h2>{title}</h2>{content}</section>')

    versions = summary.get("versions", {})
    section("overview", _table([
        ("dataset", ds.get("source")), ("invented data", ds.get("invented", False)),
        ("samples (train / test)", f"{ds.get('train_size')} / {ds.get('test_size')}"),
        ("features (raw / used)", f"{ds.get('n_features_raw')} / {ds.get('n_features')}"),
        ("classes", ", ".join(map(str, ds.get("classes", [])))),
        ("split", f"stratified, test fraction {ds.get('test_fraction')}, seed "
                  f"{summary.get('seed')}"),
        ("encoding", f"{summary.get('encoding', {}).get('family')} "
                     f"({summary.get('encoding', {}).get('kind')} kernel), "
                     f"{summary.get('n_qubits')} qubits"),
        ("objective", summary.get("objective")),
        ("training", f"{summary.get('training', {}).get('steps_run')} steps; stop: "
                     f"{summary.get('training', {}).get('stop_reason')}"),
        ("versions", ", ".join(f"{k} {v}" for k, v in versions.items())),
    ], ["item", "value"]))
    section("learning", _learning_section(history) + _table([
        ("alignment (initial -> final)",
         f"{_fmt(summary.get('alignment', {}).get('initial'))} -> "
         f"{_fmt(summary.get('alignment', {}).get('final'))}"),
        ("bandwidth (initial -> final)",
         f"{_fmt(summary.get('training', {}).get('bandwidth_initial'))} -> "
         f"{_fmt(summary.get('training', {}).get('bandwidth_final'))}"),
    ]))
    base = summary.get("baselines", {})
    rows = [("learned quantum kernel", summary.get("train_accuracy"),
             summary.get("test_accuracy"))]
    rows.append(("untrained quantum kernel", None, summary.get("untrained_test_accuracy")))
    for name, values in base.items():
        if name == "untrained_quantum":
            continue
        rows.append((name.replace("_", " "), values.get("train_accuracy"),
                     values.get("test_accuracy")))
    sig = summary.get("significance", {})
    sig_html = (f"<p class='verdict'>{html.escape(str(sig.get('verdict', 'not computed')))}</p>"
                f"<p>Test: {html.escape(str(sig.get('test')))}; p-value {_fmt(sig.get('p_value'))};"
                f" mean accuracy difference (quantum - RBF) {_fmt(sig.get('mean_difference'))} "
                f"over {_fmt(sig.get('repeats'))} paired splits.</p>")
    section("accuracy", _table(rows, ["model", "train accuracy", "test accuracy"]) + sig_html)
    section("kernels", _kernel_section(kernels))
    section("spectra", _spectra_section(kernels))
    diag = summary.get("diagnostics", {})
    conc = diag.get("concentration", {})
    geo = diag.get("geometric_difference", {})
    eff = diag.get("effective_dimension", {})
    health_rows = [(f"concentration: {k}", v) for k, v in conc.items()
                   if not isinstance(v, (dict, list))]
    health_rows += [(f"geometric difference: {k}", v) for k, v in geo.items()
                    if not isinstance(v, (dict, list))]
    health_rows += [(f"effective dimension: {k}", v) for k, v in eff.items()]
    warning = conc.get("warning")
    section("health", (f"<p class='notice'>{html.escape(warning)}</p>" if warning else "")
            + _table(health_rows, ["quantity", "value"]))
    circuit = summary.get("circuit", {})
    section("circuit", _table([(k, v) for k, v in circuit.items()], ["quantity", "value"]) +
            "<p>The learned circuit is exported as OpenQASM 3 in <code>circuit.qasm</code>.</p>")
    section("hardware", _hardware_section(summary))
    section("boundary", _boundary_section(kernels, summary))
    cautions = summary.get("cautions", [])
    section("cautions", "<ul>" + "".join(f"<li>{html.escape(c)}</li>" for c in cautions)
            + "</ul>")
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            "<title>hilbertune report</title>"
            f"<style>{_STYLE}</style></head><body>{''.join(body)}"
            f"<script type='application/json' id='summary'>"
            f"{html.escape(json.dumps(summary, default=str))}</script></body></html>")


def build_report(run_dir) -> Path:
    """Rebuild ``report.html`` of a run directory from its artifacts; returns its path."""
    from hilbertune import artifacts

    run_dir = Path(run_dir)
    summary = artifacts.read_json(run_dir / "summary.json")
    history = read_history(run_dir / "history.csv") if (run_dir / "history.csv").exists() else {}
    kernels = artifacts.read_npz(run_dir / "kernels.npz") if (run_dir / "kernels.npz").exists() \
        else {}
    out = run_dir / "report.html"
    artifacts.write_text(out, render(summary, history, kernels))
    return out
