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
    ("overview", "What was run"),
    ("selection", "Which kernel was chosen, and why"),
    ("accuracy", "Accuracy against classical baselines"),
    ("learning", "Learning curves"),
    ("kernels", "Kernel matrices before and after training"),
    ("spectra", "Eigenvalue spectra"),
    ("health", "Kernel health: concentration, effective dimension, geometric difference"),
    ("circuit", "Circuit summary"),
    ("hardware", "What would it take on hardware"),
    ("boundary", "Decision boundary"),
    ("cautions", "Cautions"),
]

_STYLE = """
body{font-family:system-ui,-apple-system,Segoe UI,sans-serif;max-width:1000px;margin:1.2em auto;
padding:0 1em;color:#222;line-height:1.4}
h1{font-size:1.5em;margin:.2em 0 .4em}h2{border-bottom:1px solid #ccc;padding-bottom:.2em;
margin-top:1.6em}h3{margin-bottom:.3em}
table{border-collapse:collapse;margin:.5em 0}td,th{border:1px solid #ccc;padding:.25em .55em;
text-align:left;vertical-align:top}th{background:#f3f3f3}
.notice{background:#fff4d6;border:1px solid #e0b84c;padding:.4em .8em;border-radius:4px;
margin:.4em 0}.verdict{font-weight:600}img{max-width:100%}
.headline{border:2px solid #4a6fa5;border-radius:6px;padding:.2em 1em .4em;margin:.6em 0;
background:#f6f9ff}.headline h2{margin-top:.3em;border:none}.headline p{margin:.35em 0}
.compact td,.compact th{padding:.15em .5em}.small{font-size:.85em;color:#444;font-weight:normal}
.intro{color:#333;background:#f7f7f7;border-left:3px solid #bbb;padding:.3em .7em}
.good{color:#1d6b2a;font-weight:600}.bad{color:#a11;font-weight:600}
code{background:#f3f3f3;padding:0 .2em}nav{margin:.6em 0;font-size:.9em}
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


# --------------------------------------------------------------------------- headline

#: The four models of the headline, in order: (key in the headline, key in
#: significance.per_repeat, plain name).
MODELS = (("chosen", "quantum", "chosen quantum kernel"),
          ("untrained", "untrained", "untrained quantum kernel"),
          ("rbf_svm", "rbf_svm", "tuned RBF SVM"),
          ("linear_svm", "linear_svm", "linear SVM"),
          ("majority_class", "majority_class", "always the most common class (reference)"))

#: Comparisons of the significance section: (key, plain name of the other model).
COMPARISON_NAMES = (("learned_vs_untrained", "the untrained quantum kernel"),
                    ("quantum_vs_rbf_svm", "the tuned RBF SVM"),
                    ("quantum_vs_linear_svm", "the linear SVM"))

_CAVEAT = ("Simulated exactly on a classical computer: a simulated kernel is no evidence "
           "about quantum hardware.")


def _number(value):
    """A finite float or None (JSON from older runs may hold strings or nulls)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    value = float(value)
    return value if np.isfinite(value) else None


def _mean_sd(values):
    values = [v for v in (_number(x) for x in values or ()) if v is not None]
    if not values:
        return None
    sd = float(np.std(values, ddof=1)) if len(values) > 1 else None
    return {"mean": float(np.mean(values)), "sd": sd, "splits": len(values)}


def _p_text(p) -> str:
    return "n/a (no variance)" if p is None else f"{p:.3g}"


def _comparisons(sig: dict) -> list:
    """The significance tests of a summary as uniform rows (older runs: the RBF test only)."""
    alpha = _number(sig.get("alpha")) or 0.05
    found = sig.get("comparisons") if isinstance(sig.get("comparisons"), dict) else {}
    rows = []
    for key, other in COMPARISON_NAMES:
        test = found.get(key)
        if test is None and key == "quantum_vs_rbf_svm" and "p_value" in sig and not found:
            # older format: one uncorrected comparison with the tuned RBF SVM
            p = _number(sig.get("p_value"))
            test = {"mean_difference": sig.get("mean_difference"), "p_value": p,
                    "p_holm": None, "t_statistic": sig.get("t_statistic"),
                    "dof": sig.get("dof"), "n_repeats": sig.get("n_repeats",
                                                               sig.get("repeats")),
                    "significant": bool(p is not None and p < alpha)}
        if test is None:
            continue
        p_holm = _number(test.get("p_holm"))
        rows.append({"comparison": key, "against": other,
                     "mean_difference": _number(test.get("mean_difference")),
                     "t_statistic": _number(test.get("t_statistic")),
                     "dof": test.get("dof"), "splits": test.get("n_repeats"),
                     "p_value": _number(test.get("p_value")), "p_holm": p_holm,
                     "significant": bool(test.get("significant", False))})
    return rows


def _learning_verdict(summary: dict, tests: dict) -> str:
    verdict = _learning_answer(summary, tests)
    sig = summary.get("significance") if isinstance(summary.get("significance"), dict) else {}
    chosen = sig.get("chosen_per_repeat")
    if isinstance(chosen, list) and chosen:
        kept = sum(name != "untrained" for name in chosen)
        verdict += (f" Inner cross-validation replaced the untrained kernel on {kept} of "
                    f"{len(chosen)} splits.")
    return verdict


def _learning_answer(summary: dict, tests: dict) -> str:
    selection = summary.get("selection") if isinstance(summary.get("selection"), dict) else {}
    chosen = selection.get("chosen")
    scopes = {c.get("name"): c.get("scope") for c in selection.get("candidates", ())
              if isinstance(c, dict)}
    picked_untrained = chosen is not None and scopes.get(chosen) == "untrained"
    test = tests.get("learned_vs_untrained")
    if test is None:
        if picked_untrained:
            return ("Learning did not help: inner cross-validation chose the untrained kernel "
                    "(no repeated-split test of learning in this run).")
        return ("Not tested: this run has no paired test of the chosen against the untrained "
                "kernel (older format), so no statement on whether learning helped.")
    detail = (f"mean difference {test['mean_difference']:+.3f} over {test['splits']} splits, "
              f"Holm-adjusted p = {_p_text(test['p_holm'])}")
    prefix = ("inner cross-validation chose the untrained kernel on the main split, and "
              if picked_untrained else "")
    if test["significant"] and test["mean_difference"] > 0:
        return ("Learning helped: the chosen kernel is significantly more accurate than the "
                f"untrained one ({detail}).")
    if test["significant"] and test["mean_difference"] < 0:
        return (f"Learning hurt: {prefix}the chosen kernel is significantly less accurate "
                f"than the untrained one ({detail}).")
    if test["mean_difference"] > 0:
        return (f"Not shown: {prefix}the chosen kernel is {100 * test['mean_difference']:.1f} "
                "points more accurate than the untrained one on average, but the difference "
                f"is within the split-to-split noise ({detail}); more splits "
                "(evaluation.repeats) would tell.")
    return (f"Learning did not help: {prefix}the chosen kernel is not more accurate than the "
            f"untrained one ({detail}).")


def _classical_verdict(tests: dict, names=COMPARISON_NAMES[1:]) -> str:
    phrases = []
    for key, other in names:
        test = tests.get(key)
        if test is None:
            phrases.append(f"not tested against {other}")
            continue
        p_name = "p" if test["p_holm"] is None and test["p_value"] is not None else \
            "Holm-adjusted p"
        p = test["p_holm"] if test["p_holm"] is not None else test["p_value"]
        detail = f"{test['mean_difference']:+.3f}, {p_name} = {_p_text(p)}"
        # "more accurate" only with a significant paired test and a positive mean difference
        if test["significant"] and test["mean_difference"] > 0:
            phrases.append(f"significantly more accurate than {other} ({detail})")
        elif test["significant"] and test["mean_difference"] < 0:
            phrases.append(f"significantly less accurate than {other} ({detail})")
        else:
            phrases.append(f"not significantly different from {other} ({detail})")
    return "The chosen quantum kernel is " + " and ".join(phrases) + ". " + _CAVEAT


#: The classical SVMs on every input column (only when the encoding saw reduced features).
ALL_FEATURE_MODELS = (("rbf_svm_all_features", "tuned RBF SVM, all input features"),
                      ("linear_svm_all_features", "linear SVM, all input features"))
ALL_FEATURE_NAMES = (("quantum_vs_rbf_svm_all_features",
                      "the tuned RBF SVM on all input features"),
                     ("quantum_vs_linear_svm_all_features",
                      "the linear SVM on all input features"))


def _all_features(summary: dict, sig: dict):
    """What the reduction to the encoding's width costs, or None when nothing was reduced."""
    family = sig.get("all_features")
    if not isinstance(family, dict) or not isinstance(family.get("comparisons"), dict):
        return None
    base = summary.get("baselines") if isinstance(summary.get("baselines"), dict) else {}
    data = summary.get("dataset") if isinstance(summary.get("dataset"), dict) else {}
    per_repeat = sig.get("per_repeat") if isinstance(sig.get("per_repeat"), dict) else {}
    alpha = _number(sig.get("alpha")) or 0.05
    tests = {key: {**test, "comparison": key, "against": other,
                   "significant": bool(test.get("significant")),
                   "alpha": alpha}
             for key, other in ALL_FEATURE_NAMES
             if isinstance(test := family["comparisons"].get(key), dict)}
    seen, total = data.get("n_features"), data.get("n_features_raw")
    how = {"pca": "principal components", "first": "first columns"}.get(
        data.get("reduction"), "reduced features")
    against = _classical_verdict(tests, ALL_FEATURE_NAMES).replace(" " + _CAVEAT, "")
    verdict = (f"The encoding sees {seen} {how} of the {total} input features; on the same "
               f"splits with all {total}, t" + against[1:])
    if any(t["significant"] and (_number(t.get("mean_difference")) or 0) < 0
           for t in tests.values()):
        verdict += (" The reduction loses information the classical kernels use: more qubits "
                    "(encoding.qubits) or, with the layered family, more features re-uploaded "
                    "onto the same qubits (data.features) let the encoding see more of it.")
    return {"features_seen": seen, "features_total": total,
            "test_accuracy": {key: _number((base.get(key) or {}).get("test_accuracy"))
                              for key, _ in ALL_FEATURE_MODELS},
            "repeated_splits": {key: _mean_sd(per_repeat.get(key))
                                for key, _ in ALL_FEATURE_MODELS},
            "correction": family.get("correction"), "tests": list(tests.values()),
            "verdict": verdict}


def _hardware_bill(summary: dict) -> dict:
    hw = summary.get("hardware")
    if not isinstance(hw, dict) or not isinstance(hw.get("shot_budget"), dict):
        return {"available": False,
                "note": "no hardware estimate in this run (hardware.enabled was off)"}
    budget = hw["shot_budget"]
    totals = budget.get("total_executions") or {}
    shots, rule, executions = budget.get("empirical_shots"), "accuracy curve", \
        totals.get("empirical")
    if shots is None:
        shots, rule, executions = budget.get("analytic_shots"), "variance rule", \
            totals.get("analytic")
    noise = hw.get("device_noise") if isinstance(hw.get("device_noise"), dict) else {}
    shots_noise = noise.get("empirical_shots_with_noise")
    executions_noise = noise.get("total_executions_with_noise")
    if executions_noise is None and shots_noise is not None:
        executions_noise = next((p.get("total_executions") for p in noise.get("curve") or ()
                                 if p.get("shots") == shots_noise), None)
    estimator = hw.get("estimator", budget.get("estimator"))
    projected = estimator == "pauli_expectations"
    if "circuits" in budget:
        circuits = int(sum(budget["circuits"].values()))
    else:
        circuits = int(sum((budget.get("entries") or {}).values())
                       * (budget.get("circuits_per_entry") or 1))
    return {"available": True, "estimator": estimator,
            "shots_unit": budget.get("shots_unit") or (
                "shots per circuit (one measurement basis of one sample)" if projected
                else "shots per circuit (one kernel entry)"),
            "distinct_circuits": circuits,
            "shots": shots, "shots_from": rule, "total_executions": executions,
            "shots_with_noise": shots_noise, "total_executions_with_noise": executions_noise,
            "depolarizing_probability": _number(noise.get("depolarizing_probability"))}


def headline(summary: dict) -> dict:
    """The four answers a reader opens the report for, from ``summary.json`` alone.

    Did learning help (chosen vs untrained kernel), does the quantum kernel beat the tuned
    classical ones (paired tests over repeated splits, with the test's name and its
    multiple-comparison correction), is the kernel healthy (concentration), and what would
    a hardware run cost (shots per entry and total circuit executions, with and without
    device noise). A quantum kernel is called more accurate only where the paired test
    against that baseline is significant after correction and its mean difference positive.
    Tolerates older summaries (missing sections give None entries and say so).

    Returns:
      JSON-able dict: chosen_kernel, test_accuracy {chosen, untrained, rbf_svm, linear_svm},
      repeated_splits {same keys: {mean, sd, splits}}, test, correction, alpha, tests
      [rows], learning_verdict, classical_verdict, concentration {concentrated, message},
      hardware {...}, caveat.
    """
    if not isinstance(summary, dict):
        raise TypeError("headline expects the summary dict of a run")
    sig = summary.get("significance") if isinstance(summary.get("significance"), dict) else {}
    base = summary.get("baselines") if isinstance(summary.get("baselines"), dict) else {}
    accuracy = {"chosen": _number(summary.get("test_accuracy")),
                "untrained": _number(summary.get("untrained_test_accuracy")),
                "rbf_svm": _number((base.get("rbf_svm") or {}).get("test_accuracy")),
                "linear_svm": _number((base.get("linear_svm") or {}).get("test_accuracy")),
                "majority_class": _number((base.get("majority_class") or {}).get(
                    "test_accuracy"))}
    per_repeat = sig.get("per_repeat") if isinstance(sig.get("per_repeat"), dict) else {}
    repeated = {key: _mean_sd(per_repeat.get(source)) for key, source, _ in MODELS}
    rows = _comparisons(sig)
    tests = {row["comparison"]: row for row in rows}
    diag = summary.get("diagnostics") if isinstance(summary.get("diagnostics"), dict) else {}
    conc = diag.get("concentration") if isinstance(diag.get("concentration"), dict) else {}
    if "concentrated" in conc:
        ratio = _number(conc.get("spread_to_noise"))
        message = conc.get("warning") or (
            f"Not concentrated: the kernel values spread {ratio:.3g} times more than the "
            f"shot noise of one estimate at {conc.get('shots')} shots." if ratio is not None
            else "Not concentrated.")
        concentration = {"concentrated": bool(conc["concentrated"]), "message": message}
    else:
        concentration = {"concentrated": None, "message": "not computed in this run"}
    selection = summary.get("selection") if isinstance(summary.get("selection"), dict) else {}
    return {
        "chosen_kernel": selection.get("chosen", "learned (no selection record)"),
        "test_accuracy": accuracy,
        "main_split": {"train": (summary.get("dataset") or {}).get("train_size"),
                       "test": (summary.get("dataset") or {}).get("test_size")},
        "repeated_splits": repeated,
        "test": sig.get("test"),
        "correction": sig.get("correction") or (
            "none (older run: one uncorrected comparison)" if rows else None),
        "alpha": _number(sig.get("alpha")),
        "tests": rows,
        "learning_verdict": _learning_verdict(summary, tests),
        "classical_verdict": _classical_verdict(tests),
        "all_features": _all_features(summary, sig),
        "concentration": concentration,
        "hardware": _hardware_bill(summary),
        "caveat": _CAVEAT,
    }


def _adjusted_text(test: dict) -> str:
    if test.get("p_holm") is None and test.get("p_value") is not None:
        return f"{test['p_value']:.3g} (not adjusted)"
    return f"{_p_text(test.get('p_value'))}, adjusted {_p_text(test.get('p_holm'))}"


def _count(value) -> str:
    """A circuit count in plain words: 6687744 -> '6.69 million'."""
    if value is None:
        return "n/a"
    value = int(value)
    for size, word in ((10**9, "billion"), (10**6, "million")):
        if value >= size:
            return f"{value / size:.3g} {word}"
    return f"{value:,}"


def _acc(value) -> str:
    return "n/a" if value is None else f"{value:.3f}"


def _shown_models(head: dict) -> dict:
    """key -> plain name of the headline's models (the reference row only when known)."""
    known = head.get("test_accuracy", {}).get("majority_class") is not None
    return {key: name for key, _, name in MODELS if key != "majority_class" or known}


def headline_lines(head: dict) -> list:
    """The headline as a few plain lines for the terminal (``fit`` prints them first)."""
    names = _shown_models(head)
    lines = ["Headline (" + head.get("caveat", _CAVEAT).rstrip(".") + ")"]
    acc = head.get("test_accuracy", {})
    split = head.get("main_split", {})
    lines.append(f"  test accuracy, main split ({split.get('test')} test rows): " + " | ".join(
        f"{names[k]} {_acc(acc.get(k))}" for k in names))
    rep = head.get("repeated_splits", {})
    shown = [(k, rep.get(k)) for k in names if rep.get(k)]
    if shown:
        n = shown[0][1]["splits"]
        lines.append(f"  mean +- sd over {n} splits: " + " | ".join(
            f"{names[k]} {v['mean']:.3f} +- {_acc(v['sd'])}" for k, v in shown))
    lines.append(f"  learning: {head.get('learning_verdict')}")
    lines.append(f"  classical: {head.get('classical_verdict')}")
    if head.get("all_features"):
        full = head["all_features"]
        rep_full = full["repeated_splits"]
        lines.append(f"  all input features: {full['verdict']} Mean +- sd over the splits: "
                     + " | ".join(f"{name} {v['mean']:.3f} +- {_acc(v['sd'])}"
                                  for key, name in ALL_FEATURE_MODELS
                                  if (v := rep_full.get(key))))
    if head.get("tests"):
        lines.append(f"  tests: {head.get('test')}; correction: {head.get('correction')}; "
                     + "; ".join(f"vs {t['against']} p = {_adjusted_text(t)}"
                                 for t in head["tests"]))
    conc = head.get("concentration", {})
    lines.append(f"  concentration: {conc.get('message')}")
    hw = head.get("hardware", {})
    if hw.get("available"):
        lines.append(
            f"  hardware ({str(hw['estimator']).replace('_', ' ')}): {hw['shots'] if hw['shots'] is not None else 'n/a'}"
            f" {hw['shots_unit']}, {_count(hw['total_executions'])} circuit executions; with "
            f"device noise {hw['shots_with_noise'] if hw['shots_with_noise'] is not None else 'n/a'}"
            f" shots, {_count(hw['total_executions_with_noise'])} executions")
    else:
        lines.append(f"  hardware: {hw.get('note')}")
    return lines


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
    return _figure_to_img(fig, "kernel heatmaps ordered by class")


def _spectra_section(kernels: dict) -> str:
    keys = [k for k in ("initial", "final", "rbf") if f"spectrum_{k}" in kernels]
    if not keys:
        return "<p>No spectra were stored.</p>"
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6, 3.4))
    for key in keys:
        values = np.clip(kernels[f"spectrum_{key}"], 1e-12, None)
        label = {"initial": "untrained quantum kernel", "final": "chosen quantum kernel",
                 "rbf": "tuned RBF kernel"}[key]
        ax.semilogy(np.arange(1, len(values) + 1), values / values.sum(), label=label)
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


def _intro(text: str) -> str:
    return f'<p class="intro">{text}</p>'


def _pm(stats) -> str:
    if not stats:
        return "n/a"
    sd = "n/a" if stats.get("sd") is None else f"{stats['sd']:.3f}"
    return f"{stats['mean']:.3f} &plusmn; {sd}"


def _esc(value) -> str:
    return html.escape(str(value))


def _headline_panel(head: dict) -> str:
    names = _shown_models(head)
    acc, rep = head["test_accuracy"], head["repeated_splits"]
    n_splits = next((v["splits"] for v in rep.values() if v), None)
    rows = "".join(
        f"<tr><th scope='row'>{_esc(name)}{' (chosen: ' + _esc(head['chosen_kernel']) + ')' if key == 'chosen' else ''}</th>"
        f"<td>{_acc(acc.get(key))}</td><td>{_pm(rep.get(key))}</td></tr>"
        for key, name in names.items())
    full = head.get("all_features")
    if full:
        rows += "".join(
            f"<tr><th scope='row'>{_esc(name)} ({_esc(full['features_total'])})</th>"
            f"<td>{_acc(full['test_accuracy'].get(key))}</td>"
            f"<td>{_pm(full['repeated_splits'].get(key))}</td></tr>"
            for key, name in ALL_FEATURE_MODELS)
    table = (f"<table class='compact'><tr><th>model</th><th>test accuracy, main split "
             f"({_esc(head['main_split'].get('test'))} test rows)</th><th>mean &plusmn; sd "
             f"over {_esc(n_splits if n_splits else 'n/a')} repeated splits</th></tr>{rows}"
             "</table>")
    tests = head.get("tests") or []
    test_text = ""
    if tests:
        test_text = (f"<p class='small'>Paired test: {_esc(head.get('test'))}; correction: "
                     f"{_esc(head.get('correction'))}; alpha = {_esc(head.get('alpha'))}. "
                     + "; ".join(f"vs {_esc(t['against'])}: p = {_esc(_adjusted_text(t))}"
                                 for t in tests) + ".</p>")
    conc = head["concentration"]
    conc_class = "bad" if conc.get("concentrated") else "good"
    conc_word = {True: "concentrated", False: "not concentrated", None: "not computed"}[
        conc.get("concentrated")]
    hw = head["hardware"]
    if hw.get("available"):
        bill = (f"{_esc(hw['shots'] if hw['shots'] is not None else 'n/a')} "
                f"{_esc(hw['shots_unit'])} with the {_esc(str(hw['estimator']).replace('_', ' '))} "
                f"estimator: "
                f"{_esc(_count(hw['total_executions']))} circuit executions in all "
                f"({_esc(hw['distinct_circuits'])} distinct circuits). With device noise: "
                f"{_esc(hw['shots_with_noise'] if hw['shots_with_noise'] is not None else 'not reached on the grid')}"
                f" shots, {_esc(_count(hw['total_executions_with_noise']))} executions.")
    else:
        bill = _esc(hw.get("note"))
    return (
        "<section id='headline' class='headline'><h2>Headline</h2>" + table +
        f"<p class='verdict'><b>Did learning help?</b> {_esc(head['learning_verdict'])}</p>"
        f"<p class='verdict'><b>Quantum against classical:</b> "
        f"{_esc(head['classical_verdict'])}</p>"
        + (f"<p class='verdict'><b>What the reduction costs:</b> "
           f"{_esc(full['verdict'])} <span class='small'>({_esc(full['correction'])}: "
           + "; ".join(f"vs {_esc(t['against'])}: p = {_esc(_adjusted_text(t))}"
                       for t in full["tests"]) + ")</span></p>" if full else "")
        + test_text +
        f"<p><b>Kernel health:</b> <span class='{conc_class}'>{conc_word}</span>. "
        f"{_esc(conc.get('message'))}</p>"
        f"<p><b>Hardware bill:</b> {bill}</p></section>")


def _selection_section(summary: dict) -> str:
    sel = summary.get("selection")
    intro = _intro(
        "Before the test rows were touched, several candidate kernels were compared by "
        "cross-validation inside the training part only (inner CV). The table gives each "
        "candidate's inner-CV accuracy (mean and standard deviation over the folds); the "
        "chosen one is marked, and each learned candidate's gain over the untrained encoding "
        "on the same folds (mean ± its standard error). A candidate is chosen by the rule "
        "stated below, so nothing learned is kept unless it wins by more than the noise.")
    if not isinstance(sel, dict) or not sel.get("candidates"):
        return intro + ("<p>This run has no record of kernel selection (it predates it): the "
                        "learned kernel was used without comparing candidates.</p>")
    rows = []
    for c in sel["candidates"]:
        name = c.get("name")
        mark = "chosen" if name == sel.get("chosen") else (
            "best mean" if name == sel.get("best") else "")
        gain = c.get("cv_gain_over_untrained")
        rows.append((name, c.get("description"), c.get("trainable_parameters"),
                     f"{_fmt(c.get('cv_accuracy_mean'), 3)} ± {_fmt(c.get('cv_accuracy_sd'), 2)}",
                     _fmt(c.get("cv_accuracy_se"), 2),
                     "—" if gain is None else
                     f"{gain:+.3f} ± {_fmt(c.get('cv_gain_over_untrained_se'), 2)}", mark))
    return (intro + _table(rows, ["candidate", "what is trained", "trainable parameters",
                                  "inner-CV accuracy (mean ± sd)", "standard error",
                                  "gain over untrained, same folds (± se)", "choice"]) +
            f"<p class='verdict'>Chosen: {_esc(sel.get('chosen'))}. {_esc(sel.get('reason', ''))}"
            "</p>" + f"<p class='small'>Rule: {_esc(sel.get('rule'))}; "
            f"{_esc(sel.get('folds'))} folds, the split drawn {_esc(sel.get('repeats', 1))} "
            "time(s) (small training parts get more draws); standard errors corrected for "
            "overlapping training sets (Nadeau &amp; Bengio 2003). "
            f"{_esc(sel.get('note', ''))}</p>")


def _accuracy_section(summary: dict, head: dict) -> str:
    base = summary.get("baselines", {})
    rep = head["repeated_splits"]
    rows = [("chosen quantum kernel", summary.get("train_accuracy"),
             summary.get("test_accuracy"), _pm(rep.get("chosen")))]
    rows.append(("untrained quantum kernel", None, summary.get("untrained_test_accuracy"),
                 _pm(rep.get("untrained"))))
    for key, label in (("rbf_svm", "tuned RBF SVM"), ("linear_svm", "linear SVM")):
        values = base.get(key, {})
        rows.append((label, values.get("train_accuracy"), values.get("test_accuracy"),
                     _pm(rep.get(key))))
    full = head.get("all_features")
    for key, label in ALL_FEATURE_MODELS if full else ():
        values = base.get(key, {})
        rows.append((f"{label} ({full['features_total']})", values.get("train_accuracy"),
                     values.get("test_accuracy"), _pm(full["repeated_splits"].get(key))))
    if head["test_accuracy"].get("majority_class") is not None:
        rows.append(("always the most common class (reference)", None,
                     head["test_accuracy"]["majority_class"],
                     _pm(rep.get("majority_class"))))
    table = "<table><tr>" + "".join(f"<th>{h}</th>" for h in (
        "model", "train accuracy (main split)", "test accuracy (main split)",
        "test accuracy over repeated splits (mean ± sd)")) + "</tr>" + "".join(
        f"<tr><td>{_esc(m)}</td><td>{_fmt(a)}</td><td>{_fmt(b)}</td><td>{c}</td></tr>"
        for m, a, b, c in rows) + "</table>"
    tests = head.get("tests") or []
    test_rows = [(f"chosen kernel vs {t['against']}", t["mean_difference"], t["t_statistic"],
                  t["dof"], t["p_value"], t["p_holm"], t["significant"]) for t in tests]
    sig = summary.get("significance", {})
    return (_intro(
        "Test accuracy of the chosen quantum kernel, the untrained quantum kernel and two "
        "classical SVMs tuned by cross-validation on the same training rows. One split is "
        "noisy, so the comparison that counts is the paired test over repeated splits "
        f"(each learned anew on its own training part): {_esc(sig.get('test', 'n/a'))}; "
        f"multiple-comparison correction: {_esc(head.get('correction') or 'n/a')}. "
        "A difference counts only when the adjusted p-value is below alpha.") + table +
        (_table(test_rows, ["comparison", "mean accuracy difference", "t statistic",
                            "degrees of freedom", "p-value", "adjusted p-value (Holm)",
                            "significant"]) if test_rows else "") +
        f"<p class='verdict'>{_esc(head['learning_verdict'])}</p>"
        f"<p class='verdict'>{_esc(head['classical_verdict'])}</p>")


def _health_section(summary: dict) -> str:
    diag = summary.get("diagnostics", {})
    conc = diag.get("concentration", {})
    parts = [_intro(
        "Three checks of the chosen kernel on the training rows. <b>Concentration</b>: if "
        "the kernel values barely differ from each other, a real device's shot noise would "
        "drown them (Thanasilp et al., Nat. Commun. 15, 5200 (2024)). <b>Effective "
        "dimension</b>: how many directions of its spectrum the kernel really uses. "
        "<b>Geometric difference g</b> (Huang et al., Nat. Commun. 12, 2631 (2021)): g near "
        "1 means the tuned RBF kernel can fit whatever the quantum kernel fits on these "
        "samples; a large g is necessary, not sufficient, for a quantum advantage.")]
    if conc.get("warning"):
        parts.append(f"<p class='notice'>{_esc(conc['warning'])}</p>")
    if conc:
        parts.append("<h3>Concentration</h3>" + _table([
            ("mean off-diagonal kernel value", conc.get("mean_offdiagonal")),
            ("standard deviation of the off-diagonal values", conc.get("std_offdiagonal")),
            ("value for random states, 1/2^n", conc.get("random_state_value")),
            ("shots assumed (per kernel entry or per measurement basis)", conc.get("shots")),
            ("shot-noise standard deviation of one estimate", conc.get("shot_noise_std")),
            ("spread / shot noise (below 1: concentrated)", conc.get("spread_to_noise")),
            ("concentrated", conc.get("concentrated")),
            ("rule", conc.get("rule"))], ["quantity", "value"]))
    eff = diag.get("effective_dimension", {})
    if eff:
        uncentered = eff.get("uncentered") if isinstance(eff.get("uncentered"), dict) else {}
        label = ("centered Gram HKH" if eff.get("computed_on")
                 else "uncentered Gram (older run)")
        rows = [(name, eff.get(key), uncentered.get(key) if uncentered else None)
                for key, name in (("initial", "untrained quantum kernel"),
                                  ("final", "chosen quantum kernel"),
                                  ("rbf", "tuned RBF kernel"))]
        parts.append(
            "<h3>Effective dimension</h3><p>Participation ratio (sum of eigenvalues)² / sum "
            "of squared eigenvalues, between 1 and the number of training rows. Computed on "
            "the centered Gram HKH (H = I - 11ᵀ/N) so that the constant component does not "
            "dominate it.</p>" + _table(rows, ["kernel", f"effective dimension ({label})",
                                               "uncentered (for comparison)"]))
    geo = diag.get("geometric_difference", {})
    if geo:
        parts.append("<h3>Geometric difference to the tuned RBF kernel</h3>")
        health = geo.get("classical_gram") or {}
        if health.get("warning"):
            parts.append(f"<p class='notice'>{_esc(health['warning'])}</p>")
        curves = geo.get("curves")
        if isinstance(curves, dict) and curves.get("learned_vs_rbf"):
            learned = curves["learned_vs_rbf"]["curve"]
            untrained = (curves.get("untrained_vs_rbf") or {}).get("curve") or [{}] * len(learned)
            chosen = geo.get("regularizer")
            parts.append(
                "<p>g depends on the regularizer lambda added to the classical Gram (both "
                "Grams normalized to trace N). Small lambda: the classical model fits its "
                "training data but g is inflated by tiny eigenvalues; large lambda: g shrinks "
                "because the classical model no longer fits. Following Huang et al. (2021), "
                "g is read at the largest lambda whose classical training error stays small "
                f"({_esc(geo.get('lambda_rule', ''))}).</p>")
            rows = []
            for a, b in zip(learned, untrained):
                mark = " (chosen)" if a.get("lambda") == chosen else ""
                rows.append((f"{a.get('lambda'):g}{mark}", a.get("g"), b.get("g"),
                             a.get("training_error_bound"), a.get("classical_training_error")))
            parts.append(_table(rows, ["lambda", "g, chosen kernel", "g, untrained kernel",
                                       "classical training error bound",
                                       "classical ridge training error (fraction)"]))
        else:
            parts.append(_table([
                ("g, chosen kernel vs tuned RBF", geo.get("learned_vs_rbf")),
                ("g, untrained kernel vs tuned RBF", geo.get("untrained_vs_rbf")),
                ("regularizer lambda (older run: one value only)", geo.get("regularizer"))],
                ["quantity", "value"]))
    return "".join(parts)


def _circuit_section(summary: dict) -> str:
    c = summary.get("circuit", {})
    rows = [("qubits", c.get("qubits")), ("circuit depth (layers of gates)", c.get("depth")),
            ("one-qubit gates", c.get("one_qubit_gates")),
            ("two-qubit gates", c.get("two_qubit_gates")),
            ("trainable parameters", c.get("trainable_parameters"))]
    if c.get("note"):
        rows.append(("note", c["note"]))
    return (_intro("Size of the encoding circuit U(x) that prepares one data point's state. "
                   "The fidelity kernel's inversion-test circuit runs it and its inverse, so "
                   "it has twice these gate counts; a projected kernel runs it once.") +
            _table(rows, ["quantity", "value"]) +
            "<p>The learned circuit is exported as OpenQASM 3 in <code>circuit.qasm</code>.</p>")


def _hardware_section(summary: dict, head: dict) -> str:
    hw = summary.get("hardware")
    intro = _intro(
        "What running the chosen kernel on a quantum computer would cost, from simulated "
        "finite-shot estimates of every kernel value (and, for the second column, a global "
        "depolarizing model of gate noise). Read the table top-down: the first shot count "
        "whose accuracy is close to the exact kernel's is what a run would need; the last "
        "column is the total number of circuit executions for training and test rows. "
        "These are model estimates, not measurements on a device.")
    if not isinstance(hw, dict) or not hw.get("shot_budget"):
        return intro + "<p>The hardware estimate was switched off for this run " \
                       "(hardware.enabled).</p>"
    budget = hw["shot_budget"]
    noise = hw.get("device_noise") or {}
    curve = budget.get("curve") or []
    noisy = {p["shots"]: p for p in noise.get("curve") or []}
    unit = head["hardware"].get("shots_unit", "shots per circuit")
    rows = []
    for point in curve:
        other = noisy.get(point["shots"])
        rows.append((point["shots"],
                     f"{point['test_accuracy_mean']:.3f} ± {point['test_accuracy_std']:.3f}",
                     (f"{other['test_accuracy_mean']:.3f} ± {other['test_accuracy_std']:.3f}"
                      if other else "n/a"),
                     f"{point['total_executions']:,} ({_count(point['total_executions'])})"))
    parts = [intro]
    exact = (budget.get("exact") or {}).get("test_accuracy")
    parts.append("<table><tr>" + "".join(f"<th>{_esc(h)}</th>" for h in (
        unit, "test accuracy, shot noise only (mean ± sd)",
        "test accuracy, shot noise and device noise (mean ± sd)",
        "total circuit executions")) + "</tr>" + "".join(
        "<tr>" + "".join(f"<td>{_esc(c)}</td>" for c in row) + "</tr>" for row in rows)
        + "</table>")
    bill = head["hardware"]
    parts.append(f"<p>Exact (simulated) kernel: test accuracy {_fmt(exact)}. Shots needed "
                 f"(accuracy within {_fmt(budget.get('tolerance'))} of exact, from the curve):"
                 f" {_fmt(budget.get('empirical_shots'))} without and "
                 f"{_fmt(bill.get('shots_with_noise'))} with device noise; by the variance "
                 f"rule: {_fmt(budget.get('analytic_shots'))} ({_esc(budget.get('analytic_rule', ''))}).</p>")
    if curve:
        plt = _pyplot()
        fig, ax = plt.subplots(figsize=(6, 3.2))
        ax.errorbar([p["shots"] for p in curve], [p["test_accuracy_mean"] for p in curve],
                    yerr=[p["test_accuracy_std"] for p in curve], fmt="o-",
                    label="shot noise only")
        if noisy:
            points = sorted(noisy.values(), key=lambda p: p["shots"])
            ax.errorbar([p["shots"] for p in points], [p["test_accuracy_mean"] for p in points],
                        yerr=[p["test_accuracy_std"] for p in points], fmt="s--",
                        label="shot noise + device noise")
        if exact is not None:
            ax.axhline(exact, color="k", ls=":", label="exact kernel")
        ax.set_xscale("log")
        ax.set_xlabel(unit)
        ax.set_ylabel("test accuracy")
        ax.legend()
        parts.append(_figure_to_img(fig, "test accuracy against shots"))
    details = [("estimator", str(hw.get("estimator")).replace("_", " ")),
               ("qubits per circuit", budget.get("qubits_per_circuit")),
               ("distinct circuits (training and test rows)", bill.get("distinct_circuits")),
               ("repeated draws per shot count", budget.get("repeats"))]
    if noise:
        details += [("device-noise model", noise.get("model")),
                    ("error per one-qubit gate", noise.get("one_qubit_error")),
                    ("error per two-qubit gate", noise.get("two_qubit_error")),
                    ("readout error per measured bit", noise.get("readout_error")),
                    ("global depolarizing probability p of the circuit",
                     noise.get("depolarizing_probability")),
                    ("p derived from", noise.get("p_from"))]
    parts.append(_table(details, ["quantity", "value"]))
    return "".join(parts)


def _overview_section(summary: dict) -> str:
    ds = summary.get("dataset", {})
    enc = summary.get("encoding", {})
    training = summary.get("training", {})
    versions = summary.get("versions", {})
    rows = [
        ("dataset", ds.get("source")), ("invented data", ds.get("invented", False)),
        ("rows (train / test)", f"{ds.get('train_size')} / {ds.get('test_size')}"),
        ("features (raw / used)", f"{ds.get('n_features_raw')} / {ds.get('n_features')}"),
        ("classes", ", ".join(map(str, ds.get("classes", [])))),
        ("split", f"stratified, test fraction {ds.get('test_fraction')}, seed "
                  f"{summary.get('seed')}"),
        ("encoding", f"{enc.get('family')} ({enc.get('kind')} kernel), "
                     f"{summary.get('n_qubits')} qubits"),
        ("training objective", summary.get("objective")),
        ("training", f"{training.get('steps_run')} steps; stop: {training.get('stop_reason')}"),
        ("SVM constant C", f"{_fmt((summary.get('svm') or {}).get('C'))}"
                           + (" (tuned by cross-validation)"
                              if (summary.get("svm") or {}).get("tuned_by_cv") else "")),
        ("total wall time (s)", summary.get("wall_time_s")),
        ("versions", ", ".join(f"{k} {v}" for k, v in versions.items())),
    ]
    timings = summary.get("timings")
    if isinstance(timings, dict) and timings:
        rows.append(("time per stage (s)", "; ".join(
            f"{k.replace('_', ' ')} {_fmt(v, 3)}" for k, v in timings.items())))
    return (_intro("What was run: the data, the split, the encoding circuit and how it was "
                   "trained. Everything below refers to this configuration; "
                   "<code>config.toml</code> holds every setting.") +
            _table(rows, ["item", "value"]))


def render(summary: dict, history: dict, kernels: dict) -> str:
    """The whole report as an HTML string (self-contained: styles inline, images base64)."""
    ds = summary.get("dataset", {})
    head = headline(summary)
    body = ["<h1>hilbertune training report</h1>",
            '<p class="notice">All quantum kernels here were <b>simulated</b> exactly on a '
            "classical computer. A simulated kernel is no evidence about how the same circuit "
            "behaves on quantum hardware.</p>"]
    if ds.get("invented"):
        body.append('<p class="notice">The data in this run are <b>invented</b>: generated by '
                    "hilbertune's own demo generator for illustration. They describe no real "
                    "system.</p>")
    body.append(_headline_panel(head))
    body.append("<nav><b>Sections:</b> " + " · ".join(
        f'<a href="#{k}">{t}</a>' for k, t in SECTIONS) + "</nav>")

    def section(key, content):
        title = dict(SECTIONS)[key]
        body.append(f'<section id="{key}"><h2>{title}</h2>{content}</section>')

    training = summary.get("training", {})
    align = summary.get("alignment", {})
    section("overview", _overview_section(summary))
    section("selection", _selection_section(summary))
    section("accuracy", _accuracy_section(summary, head))
    section("learning", _intro(
        "How training went: the objective per optimizer step (lower is better) on the "
        "training batch and on held-out validation rows, and the kernel-target alignment "
        "(Cristianini et al., NIPS 2001; 1 = the kernel separates the classes perfectly). "
        "A validation curve that rises again while training falls means over-fitting; "
        "training stopped at the best validation step.") + _learning_section(history) +
        _table([("kernel-target alignment (untrained -> chosen)",
                 f"{_fmt(align.get('initial'))} -> {_fmt(align.get('final'))}"),
                ("centered alignment (untrained -> chosen)",
                 f"{_fmt(align.get('centered_initial'))} -> {_fmt(align.get('centered_final'))}"),
                ("bandwidth, feature scale factor (initial -> final)",
                 f"{_fmt(training.get('bandwidth_initial'))} -> "
                 f"{_fmt(training.get('bandwidth_final'))}"),
                ("best step", training.get("best_step")),
                ("training wall time (s)", training.get("wall_time_s"))],
               ["quantity", "value"]))
    section("kernels", _intro(
        "The training Gram matrices as images, rows and columns ordered by class. Each pixel "
        "is the kernel value (similarity, 0 to 1) of two training rows; a kernel that "
        "separates the classes shows bright blocks on the diagonal and dark blocks off "
        "it.") + _kernel_section(kernels))
    section("spectra", _intro(
        "Eigenvalues of each training Gram, divided by their sum, largest first, on a log "
        "scale. A spectrum that falls off quickly means the kernel uses few directions; a "
        "flat one means it treats every row as nearly unrelated to the others, which "
        "generalizes badly.") + _spectra_section(kernels))
    section("health", _health_section(summary))
    section("circuit", _circuit_section(summary))
    section("hardware", _hardware_section(summary, head))
    section("boundary", _intro(
        "For data with two features: the chosen kernel SVM's decision regions over the "
        "scaled feature plane, with training (circles) and test rows (triangles).") +
        _boundary_section(kernels, summary))
    cautions = summary.get("cautions", [])
    section("cautions", _intro("Limits of this run that a reader should keep in mind.") +
            "<ul>" + "".join(f"<li>{html.escape(c)}</li>" for c in cautions) + "</ul>")
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            "<title>hilbertune report</title>"
            f"<style>{_STYLE}</style></head><body>{''.join(body)}"
            f"<script type='application/json' id='summary'>"
            f"{html.escape(json.dumps(summary, default=str))}</script></body></html>")


#: Artifacts a report is built from, and the summary keys it cannot do without.
REPORT_INPUTS = ("summary.json", "history.csv", "kernels.npz")
REQUIRED_SUMMARY_KEYS = ("n_qubits", "test_accuracy", "untrained_test_accuracy",
                         "baselines.rbf_svm.test_accuracy",
                         "baselines.linear_svm.test_accuracy", "significance", "diagnostics",
                         "dataset")


def _missing_keys(summary) -> list:
    missing = []
    for dotted in REQUIRED_SUMMARY_KEYS:
        node = summary
        for part in dotted.split("."):
            node = node.get(part) if isinstance(node, dict) else None
        if node is None:
            missing.append(dotted)
    return missing


def build_report(run_dir) -> Path:
    """Rebuild ``report.html`` of a run directory from its artifacts; returns its path.

    Raises ``ArtifactError`` (one line, exit 2 on the command line) naming every missing
    artifact or summary key before anything is written.
    """
    from hilbertune import artifacts
    from hilbertune.errors import ArtifactError

    run_dir = Path(run_dir)
    absent = [name for name in REPORT_INPUTS if not (run_dir / name).is_file()]
    if absent:
        raise ArtifactError(f"cannot build the report: {', '.join(absent)} missing from "
                            f"{str(run_dir)!r}; restore the file(s) or rerun the fit")
    summary = artifacts.read_json(run_dir / "summary.json")
    if not isinstance(summary, dict):
        raise ArtifactError("cannot build the report: summary.json is not a JSON object; "
                            "restore it or rerun the fit")
    missing = _missing_keys(summary)
    if missing:
        raise ArtifactError(f"cannot build the report: summary.json in {str(run_dir)!r} "
                            f"(format {summary.get('format_version', 'unknown')}) lacks "
                            f"{', '.join(missing)}; rerun the fit with this version")
    history = read_history(run_dir / "history.csv")
    kernels = artifacts.read_npz(run_dir / "kernels.npz")
    out = run_dir / "report.html"
    text = render(summary, history, kernels)
    artifacts.write_text(out, text)
    return out
