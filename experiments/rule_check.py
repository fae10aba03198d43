"""Confirmation run for the selection rule, on splits and datasets the rule was not chosen on.

Place in the project: the rule that turns inner-CV scores into a choice
(``selection.one_standard_error_choice``). The accuracy study
(``experiments/accuracy_study.py``, split seeds 0-4) was used to pick the default candidate
set and, later, to propose a change of rule: the one-standard-error rule walked the
candidates in a fixed "simplicity" order (untrained, rescaled bandwidths closest to 1 first,
then training stopped early, then training run to the end), although only one step of that
order is a real difference in complexity: nothing learned from the labels (the untrained
encoding) against something learned. On the invented demo data the walk kept stopping at
the early-stopped training while the fully trained one was both best in inner CV and best
on held-out data.

Rules compared (all on the same recorded inner-CV fold accuracies; nothing is re-run per
rule):
  one_standard_error: the simplest candidate within one corrected SE of the best
    (Hastie et al. 2009, 7.10, with the recorded order as "simplicity").
  best_or_untrained: the best candidate if its mean beats the untrained encoding's by more
    than one corrected SE of the best mean; otherwise the untrained encoding.
  best: the highest mean, no guard.

Decision stated BEFORE this run: make ``best_or_untrained`` the default if, on this run's
data, (a) no dataset's mean over seeds falls more than 0.5 pt below the untrained kernel and
(b) its mean gain over the untrained kernel is at least that of ``one_standard_error``;
otherwise keep ``one_standard_error``.

Data (none used to choose the candidates or the rule):
  * the 13 datasets of the accuracy study with NEW split seeds 5-9;
  * four datasets not in the accuracy study (scikit-learn bundled data and generators),
    seeds 0-4;
  * the tool's invented demo data (``hilbertune.data.invented_demo``), seeds 0-9. This one
    is NOT fresh: it motivated the proposal, so it is reported separately and does not
    enter the decision.

Candidates: the tool's default set (untrained; rescaled x0.25, 0.5, 2, 4; full training
with centered alignment and ridge LOO at 1/4 of 60 steps and at the end), 5 inner folds,
automatic repeats. Outputs (``--out``, default experiments/results): ``rule_check.json``
(raw; resumes) and ``rule_check.md``.

Round 2 (``--round 2``; outputs ``rule_check_round2.{json,md}``). Proposed after round 1,
on the recorded inner-CV folds of the accuracy study and of round 1 (the "development"
data): ``paired``, the best candidate if its fold-by-fold gain over the untrained encoding
on the same inner folds exceeds one corrected standard error of that paired difference
(Nadeau & Bengio 2003), otherwise the untrained encoding. On the development data (18
datasets) it gained +1.0 pt over the untrained kernel on average against +0.6 pt for
``one_standard_error``, worst dataset -0.5 pt against -0.8 pt.

Decision stated BEFORE the round-2 run: make ``paired`` the default if, pooled over the
round-2 data below (per dataset and group, means over seeds), (a) its mean gain over the
untrained kernel is at least that of ``one_standard_error`` and (b) its worst dataset is no
worse than the worst dataset of ``one_standard_error``; otherwise keep
``one_standard_error``.

Round-2 data (none used before by the study, round 1 or the proposal):
  * eleven datasets new to the project (scikit-learn bundled data and generators), seeds
    0-4;
  * the 13 datasets of the accuracy study with NEW split seeds 10-14.

Round 3 (``--round 3``; outputs ``rule_check_round3.{json,md}``). Proposed after round 2,
on the recorded inner-CV folds of the study and rounds 1 and 2 (110 splits whose training
parts were small enough for two or more draws of the inner split): at a fixed number of
trainings, a more precise inner estimate beat more candidates. With the ``paired`` rule,
two objectives on 5 folds (today's default, 10 trainings) gained +0.44 pt over the
untrained kernel on those splits (worst dataset -0.53); one objective (centered alignment)
on 10 folds (also 10 trainings) gained +0.65 pt (worst 0.00). Proposal ``one_objective``:
the default candidates with full training by ``training.objective`` only (no ridge LOO
twin) and the inner split drawn until every candidate has at least 400 held-out
predictions (``selection.MIN_PREDICTIONS`` 200 -> 400). Same trainings as today for
training parts of 200 to 399 rows, half above.

Decision stated BEFORE the round-3 run: make ``one_objective`` the default if, pooled over
the round-3 data (per dataset and group, means over seeds), (a) its mean gain over the
untrained kernel is at least that of today's default (``paired`` with both objectives and
200 predictions, replayed on the first draws of the same recorded folds, which are exactly
the folds it would have drawn) and (b) its worst dataset is no worse than today's
default's worst dataset; otherwise keep today's default.

Round-3 data (none used before by the study or rounds 1 and 2):
  * ten datasets new to the project, seeds 0-4 (two of them with three classes);
  * the 13 datasets of the accuracy study with NEW split seeds 15-17.

Usage: ``python experiments/rule_check.py [--round 1|2|3] [--quick] [--out DIR]
[--analyse-only]``.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent
sys.path.insert(0, str(ROOT))

import accuracy_study as study  # noqa: E402  (sibling experiment: datasets, run_entry)

#: per round: (raw file, table file, rules compared, rule proposed)
ROUNDS = {1: ("rule_check.json", "rule_check.md",
              ("one_standard_error", "best_or_untrained", "best"), "best_or_untrained"),
          2: ("rule_check_round2.json", "rule_check_round2.md",
              ("one_standard_error", "paired", "best_or_untrained", "best"), "paired"),
          3: ("rule_check_round3.json", "rule_check_round3.md",
              ("paired", "one_objective"), "one_objective")}
#: round 3: (candidate names kept, held-out predictions per candidate) of each policy
ROUND3 = {"paired": (None, 200), "one_objective": (
    ("untrained", "rescaled x0.5", "rescaled x2", "rescaled x0.25", "rescaled x4",
     "full/centered_alignment@15", "full/centered_alignment@60"), 400)}


def settings(quick: bool, round_: int = 1) -> dict:
    base = study.study_settings(quick)
    base["selection"] = {"scopes": ["untrained", "rescaled", "full"],
                         "objectives": ["centered_alignment", "ridge_loo"],
                         "trajectory": [0.25, 1.0],
                         "bandwidth_factors": list(study.FACTORS),
                         "folds": 2 if quick else 5}
    if round_ == 3:  # record enough draws for the larger of the two policies
        base["selection"]["min_predictions"] = max(p for _, p in ROUND3.values())
    base.pop("seeds")
    return base


def specs(quick: bool, round_: int = 1) -> list:
    """(group, name, qubits, source, loader, seeds)."""
    from sklearn import datasets as sk

    from hilbertune import data

    def demo():
        d = data.invented_demo(n_samples=240, seed=0)
        return d.X, d.y

    if quick:
        return [("fresh", "moons (quick)", 2, "sklearn.datasets.make_moons(60, noise=0.2)",
                 lambda: sk.make_moons(60, noise=0.2, random_state=0), [5])]

    def pair(loader, a, b):
        def load():
            X, y = loader(return_X_y=True)
            return study._two_classes(X, y, a, b)
        return load

    if round_ == 2:
        return round2_specs(pair)
    if round_ == 3:
        return round3_specs(pair)
    out = [("new seeds", name, q, source, loader, [5, 6, 7, 8, 9])
           for name, q, source, _, loader in study.dataset_specs(False)]
    fresh = [
        ("wine 1 vs 2", 6, "sklearn.datasets.load_wine, classes 1 and 2 (119 rows)",
         pair(sk.load_wine, 1, 2)),
        ("digits 4 vs 9", 6, "sklearn.datasets.load_digits, digits 4 and 9, PCA",
         pair(sk.load_digits, 4, 9)),
        ("classification 6-D", 4, "sklearn.datasets.make_classification(250, n_features=6, "
         "n_informative=3, n_redundant=1, flip_y=0.05, random_state=7)",
         lambda: sk.make_classification(250, n_features=6, n_informative=3, n_redundant=1,
                                        flip_y=0.05, random_state=7)),
        ("gaussian quantiles 2-D", 4, "sklearn.datasets.make_gaussian_quantiles(n_samples="
         "250, n_features=2, n_classes=2, random_state=0)",
         lambda: sk.make_gaussian_quantiles(n_samples=250, n_features=2, n_classes=2,
                                            random_state=0)),
    ]
    out += [("fresh datasets", n, q, s, l, [0, 1, 2, 3, 4]) for n, q, s, l in fresh]
    out.append(("demo (not fresh)", "invented demo", 4,
                "hilbertune.data.invented_demo(240, seed=0), INVENTED", demo, list(range(10))))
    return out


def round2_specs(pair) -> list:
    from sklearn import datasets as sk

    def diabetes():
        X, target = sk.load_diabetes(return_X_y=True)
        return X, (target > np.median(target)).astype(int)

    fresh = [
        ("diabetes above median", 6, "sklearn.datasets.load_diabetes, target above its "
         "median (442 rows, 10 columns)", diabetes),
        ("wine 0 vs 2", 6, "sklearn.datasets.load_wine, classes 0 and 2 (107 rows)",
         pair(sk.load_wine, 0, 2)),
        ("digits 2 vs 3", 6, "sklearn.datasets.load_digits, digits 2 and 3, PCA",
         pair(sk.load_digits, 2, 3)),
        ("digits 5 vs 9", 6, "sklearn.datasets.load_digits, digits 5 and 9, PCA",
         pair(sk.load_digits, 5, 9)),
        ("hastie 10-D", 6, "sklearn.datasets.make_hastie_10_2(300, random_state=2)",
         lambda: sk.make_hastie_10_2(300, random_state=2)),
        ("moons noise 0.2", 4, "sklearn.datasets.make_moons(250, noise=0.2, "
         "random_state=3)", lambda: sk.make_moons(250, noise=0.2, random_state=3)),
        ("circles noise 0.1", 4, "sklearn.datasets.make_circles(250, noise=0.1, factor=0.5, "
         "random_state=3)",
         lambda: sk.make_circles(250, noise=0.1, factor=0.5, random_state=3)),
        ("classification 10-D, 2 clusters", 6, "sklearn.datasets.make_classification(300, "
         "n_features=10, n_informative=5, n_redundant=2, n_clusters_per_class=2, "
         "class_sep=0.8, flip_y=0.02, random_state=11)",
         lambda: sk.make_classification(300, n_features=10, n_informative=5, n_redundant=2,
                                        n_clusters_per_class=2, class_sep=0.8, flip_y=0.02,
                                        random_state=11)),
        ("gaussian quantiles 4-D", 4, "sklearn.datasets.make_gaussian_quantiles(n_samples="
         "300, n_features=4, n_classes=2, random_state=4)",
         lambda: sk.make_gaussian_quantiles(n_samples=300, n_features=4, n_classes=2,
                                            random_state=4)),
        ("blobs 3-D, overlapping", 4, "sklearn.datasets.make_blobs(250, centers=2, "
         "n_features=3, cluster_std=3.0, random_state=5)",
         lambda: sk.make_blobs(250, centers=2, n_features=3, cluster_std=3.0,
                               random_state=5)),
        ("iris setosa+versicolor vs virginica", 4, "sklearn.datasets.load_iris, classes 0 "
         "and 1 against 2 (150 rows)",
         lambda: (sk.load_iris(return_X_y=True)[0],
                  (sk.load_iris(return_X_y=True)[1] == 2).astype(int))),
    ]
    out = [("fresh datasets (round 2)", n, q, s, l, [0, 1, 2, 3, 4]) for n, q, s, l in fresh]
    out += [("new seeds 10-14", name, q, source, loader, [10, 11, 12, 13, 14])
            for name, q, source, _, loader in study.dataset_specs(False)]
    return out


def round3_specs(pair) -> list:
    from sklearn import datasets as sk

    def whole(loader):
        return lambda: loader(return_X_y=True)

    fresh = [
        ("digits 7 vs 9", 6, "sklearn.datasets.load_digits, digits 7 and 9, PCA",
         pair(sk.load_digits, 7, 9)),
        ("digits 3 vs 5", 6, "sklearn.datasets.load_digits, digits 3 and 5, PCA",
         pair(sk.load_digits, 3, 5)),
        ("wine, 3 classes", 6, "sklearn.datasets.load_wine, all 178 rows", whole(sk.load_wine)),
        ("iris, 3 classes", 4, "sklearn.datasets.load_iris, all 150 rows", whole(sk.load_iris)),
        ("moons noise 0.25", 4, "sklearn.datasets.make_moons(250, noise=0.25, "
         "random_state=11)", lambda: sk.make_moons(250, noise=0.25, random_state=11)),
        ("circles noise 0.15", 4, "sklearn.datasets.make_circles(250, noise=0.15, "
         "factor=0.6, random_state=11)",
         lambda: sk.make_circles(250, noise=0.15, factor=0.6, random_state=11)),
        ("classification 5-D", 4, "sklearn.datasets.make_classification(250, n_features=5, "
         "n_informative=3, n_redundant=0, flip_y=0.05, random_state=21)",
         lambda: sk.make_classification(250, n_features=5, n_informative=3, n_redundant=0,
                                        flip_y=0.05, random_state=21)),
        ("gaussian quantiles 3-D", 4, "sklearn.datasets.make_gaussian_quantiles(n_samples="
         "250, n_features=3, n_classes=2, random_state=8)",
         lambda: sk.make_gaussian_quantiles(n_samples=250, n_features=3, n_classes=2,
                                            random_state=8)),
        ("hastie 10-D, second draw", 6, "sklearn.datasets.make_hastie_10_2(250, "
         "random_state=9)", lambda: sk.make_hastie_10_2(250, random_state=9)),
        ("classification 12-D", 6, "sklearn.datasets.make_classification(300, n_features=12, "
         "n_informative=8, class_sep=1.0, random_state=31)",
         lambda: sk.make_classification(300, n_features=12, n_informative=8, class_sep=1.0,
                                        random_state=31)),
    ]
    out = [("fresh datasets (round 3)", n, q, s, l, [0, 1, 2, 3, 4]) for n, q, s, l in fresh]
    out += [("new seeds 15-17", name, q, source, loader, [15, 16, 17])
            for name, q, source, _, loader in study.dataset_specs(False)]
    return out


def policy_candidates(entry: dict, policy: str, folds: int) -> list:
    """Round 3: the recorded candidates a policy would have had, scored on the inner folds
    it would have drawn (the first draws of the recorded ones; a draw's folds depend only on
    the seed and the draw's index, so the replay is exact)."""
    from hilbertune.selection import SelectionSettings, corrected_standard_error, repeats_for

    names, predictions = ROUND3[policy]
    draws = repeats_for(entry["n_train"], SelectionSettings(), predictions)
    out = []
    for c in entry["candidates"]:
        if names is not None and c["name"] not in names:
            continue
        values = np.asarray(c["fold_accuracies"][:draws * folds], dtype=np.float64)
        out.append({**c, "fold_accuracies": values.tolist(), "mean": float(values.mean()),
                    "sd": float(values.std(ddof=1)),
                    "se": corrected_standard_error(values, folds)})
    return out


def pick(entry: dict, rule: str, folds: int, round_: int) -> dict:
    if round_ == 3:
        return choose(policy_candidates(entry, rule, folds), "paired", folds)
    return choose(entry["candidates"], rule, folds)


def collect(out: Path, quick: bool, round_: int = 1) -> dict:
    path = out / ROUNDS[round_][0]
    config = settings(quick, round_)
    raw = json.loads(path.read_text()) if path.exists() else {"settings": config,
                                                              "entries": []}
    if raw["settings"] != config:
        raise SystemExit(f"{path} was made with other settings; pass another --out")
    done = {(e["dataset"], e["seed"]) for e in raw["entries"]}
    started = time.perf_counter()
    for group, name, qubits, source, loader, seeds in specs(quick, round_):
        for seed in seeds:
            if (name, seed) in done:
                continue
            entry = study.run_entry(name, qubits, loader, seed, {**config,
                                                                  "seeds": seeds})
            entry["group"], entry["source"] = group, source
            raw["entries"].append(entry)
            raw["meta"] = study._meta(quick)
            study._write_atomic(path, json.dumps(raw, indent=1) + "\n")
            print(f"[{time.perf_counter() - started:7.1f} s] {name} seed {seed}: "
                  f"{entry['seconds']:.1f} s", flush=True)
    return raw


def choose(candidates: list, rule: str, folds: int = 5) -> dict:
    """Replay a rule on one entry's recorded candidates (simplest first)."""
    from hilbertune.selection import Candidate, CandidateScore, one_standard_error_choice

    scores = [CandidateScore(Candidate(c["name"], c["scope"], c["objective"], c["steps"],
                                       c["factor"]),
                             c["trainable_parameters"], tuple(c["fold_accuracies"]),
                             c["mean"], c["sd"], c["se"]) for c in candidates]
    return candidates[one_standard_error_choice(scores, rule, folds)[1]]


def analyse(raw: dict, round_: int = 1) -> dict:
    _, _, rules, proposed = ROUNDS[round_]
    folds = raw["settings"]["selection"]["folds"]
    groups = {}
    for e in raw["entries"]:
        groups.setdefault(e["group"], {}).setdefault(e["dataset"], []).append(e)
    result = {}
    for group, datasets in groups.items():
        rows = {}
        for name, entries in datasets.items():
            untrained = float(np.mean([e["candidates"][0]["test_accuracy"] for e in entries]))
            rows[name] = {"seeds": len(entries), "untrained": untrained,
                          "rbf_svm": float(np.mean([e["rbf_svm"] for e in entries])),
                          **{rule: float(np.mean([pick(e, rule, folds, round_)
                                                  ["test_accuracy"] for e in entries]))
                             - untrained for rule in rules}}
        summary = {}
        for rule in rules:
            gaps = [r[rule] for r in rows.values()]
            summary[rule] = {"worst": min(gaps), "mean_gain": float(np.mean(gaps)),
                             "gaining_1pt": int(sum(g >= 0.01 - 1e-9 for g in gaps)),
                             "median_gap_to_rbf": float(statistics.median(
                                 r["rbf_svm"] - r["untrained"] - r[rule]
                                 for r in rows.values()))}
        result[group] = {"datasets": rows, "summary": summary}
    decision_groups = [g for g in result if not g.startswith("demo")]
    pooled = {rule: [r[rule] for g in decision_groups
                     for r in result[g]["datasets"].values()] for rule in rules}
    baseline = "paired" if round_ == 3 else "one_standard_error"  # today's default, each round
    gain_ok = np.mean(pooled[proposed]) >= np.mean(pooled[baseline]) - 1e-12
    if round_ == 1:  # the condition written down before round 1
        worst_ok = min(pooled[proposed]) >= -0.005 - 1e-9
    else:  # the condition written down before rounds 2 and 3
        worst_ok = min(pooled[proposed]) >= min(pooled[baseline]) - 1e-12
    result["decision"] = {
        "groups": decision_groups, "proposed": proposed,
        "worst": {rule: min(v) for rule, v in pooled.items()},
        "mean_gain": {rule: float(np.mean(v)) for rule, v in pooled.items()},
        "adopt": bool(gain_ok and worst_ok)}
    return result


#: the default candidate set (what rounds 1 and 2 ran); the accuracy study recorded more
DEFAULT_NAMES = ("untrained", "rescaled x0.5", "rescaled x2", "rescaled x0.25", "rescaled x4",
                 "full/centered_alignment@15", "full/ridge_loo@15",
                 "full/centered_alignment@60", "full/ridge_loo@60")
POOLED_SOURCES = ("accuracy_study.json", "rule_check.json", "rule_check_round2.json",
                  "rule_check_round3.json")


def pooled(out: Path, rules=("paired", "one_standard_error", "best")) -> dict:
    """Every recorded split of every evaluation (the study's seeds 0-4, rounds 1 to 3),
    the default candidate set replayed under each rule, per dataset (the demo left out).
    Round 3 recorded more draws of the inner split than the default takes: only the draws
    the default would have made are used (``policy_candidates``)."""
    rows = {}
    for name in POOLED_SOURCES:
        if not (out / name).exists():
            continue
        raw = json.loads((out / name).read_text())
        folds = raw["settings"]["selection"]["folds"]
        for e in raw["entries"]:
            if e["dataset"] == "invented demo":
                continue
            candidates = [c for c in e["candidates"] if c["name"] in DEFAULT_NAMES]
            if "min_predictions" in raw["settings"]["selection"]:
                candidates = policy_candidates({**e, "candidates": candidates}, "paired",
                                               folds)
            untrained = candidates[0]["test_accuracy"]
            row = rows.setdefault(e["dataset"], {"untrained": [], "rbf_svm": [],
                                                 **{rule: [] for rule in rules}})
            row["untrained"].append(untrained)
            row["rbf_svm"].append(e["rbf_svm"])
            for rule in rules:
                row[rule].append(choose(candidates, rule, folds)["test_accuracy"] - untrained)
    return {name: {"seeds": len(r["untrained"]),
                   **{k: float(np.mean(v)) for k, v in r.items()}} for name, r in rows.items()}


def pooled_lines(table: dict, rules=("paired", "one_standard_error", "best")) -> list:
    def pt(v):
        return f"{100 * v:+.1f}"

    lines = ["## Every evaluation pooled", "",
             "The accuracy study's seeds 0-4 and rounds 1 to 3 together: every recorded "
             "split, the default candidate set replayed under each rule (the demo left out). "
             "Gain over the untrained kernel in points, mean over the seeds.", "",
             "| dataset | seeds | untrained | " + " | ".join(rules) + " | tuned RBF SVM |",
             "|---|---|---|" + "---|" * len(rules) + "---|"]
    for name, r in table.items():
        lines.append(f"| {name} | {r['seeds']} | {r['untrained']:.3f} | "
                     + " | ".join(pt(r[rule]) for rule in rules) + f" | {r['rbf_svm']:.3f} |")
    lines += ["", "| rule | worst dataset | mean gain | datasets >= +1 pt | datasets below "
              "-0.5 pt |", "|---|---|---|---|---|"]
    for rule in rules:
        gains = [r[rule] for r in table.values()]
        lines.append(f"| {rule} | {pt(min(gains))} | {pt(float(np.mean(gains)))} | "
                     f"{sum(g >= 0.01 - 1e-9 for g in gains)} | "
                     f"{sum(g < -0.005 - 1e-9 for g in gains)} |")
    return lines + [""]


def write_markdown(raw: dict, result: dict, path: Path, round_: int = 1) -> None:
    rules = ROUNDS[round_][2]

    def pt(v):
        return f"{100 * v:+.1f}"

    lines = [f"# Selection rule: confirmation on unseen splits and datasets (round {round_})",
             "",
             "Generated by `experiments/rule_check.py` (see its docstring for the protocol and "
             "the decision stated before the run). Test accuracy of the chosen kernel minus "
             "the untrained kernel's, mean over seeds, in points. Exact statevector "
             "simulation on the CPU: says nothing about hardware.", ""]
    for group, block in result.items():
        if group == "decision":
            continue
        lines += [f"## {group}", "", "| dataset | seeds | untrained | "
                  + " | ".join(rules) + " | tuned RBF SVM |",
                  "|---|---|---|" + "---|" * len(rules) + "---|"]
        for name, r in block["datasets"].items():
            lines.append(f"| {name} | {r['seeds']} | {r['untrained']:.3f} | "
                         + " | ".join(pt(r[rule]) for rule in rules)
                         + f" | {r['rbf_svm']:.3f} |")
        s = block["summary"]
        lines += ["", "| rule | worst dataset | mean gain | datasets >= +1 pt | median gap "
                  "to RBF |", "|---|---|---|---|---|"]
        lines += [f"| {rule} | {pt(s[rule]['worst'])} | {pt(s[rule]['mean_gain'])} | "
                  f"{s[rule]['gaining_1pt']} | {pt(s[rule]['median_gap_to_rbf'])} |"
                  for rule in rules]
        lines.append("")
    d = result["decision"]
    lines += ["## Decision", "",
              f"Pooled over {', '.join(d['groups'])}: worst dataset "
              + ", ".join(f"{rule} {pt(d['worst'][rule])}" for rule in rules)
              + "; mean gain " + ", ".join(f"{rule} {pt(d['mean_gain'][rule])}"
                                           for rule in rules) + " (points).",
              "",
              f"Adopt `{d['proposed']}` as the default: "
              + ("**yes** (both conditions met)." if d["adopt"] else
                 f"**no** (a condition failed; "
                 f"`{'paired' if round_ == 3 else 'one_standard_error'}` stays)."), ""]
    if round_ == max(ROUNDS):  # the latest round's table carries every evaluation
        lines += pooled_lines(pooled(path.parent))
    path.write_text("\n".join(lines))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--round", type=int, choices=sorted(ROUNDS), default=max(ROUNDS),
                        dest="round_", help=f"which confirmation round (default {max(ROUNDS)})")
    parser.add_argument("--quick", action="store_true", help="one tiny dataset (CI)")
    parser.add_argument("--out", default=str(ROOT / "results"))
    parser.add_argument("--analyse-only", action="store_true")
    args = parser.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    raw_name, table_name, rules, proposed = ROUNDS[args.round_]
    raw = (json.loads((out / raw_name).read_text()) if args.analyse_only
           else collect(out, args.quick, args.round_))
    result = analyse(raw, args.round_)
    write_markdown(raw, result, out / table_name, args.round_)
    d = result["decision"]
    print(f"mean gain over untrained: " + ", ".join(
        f"{rule} {100 * d['mean_gain'][rule]:+.2f} pt" for rule in rules))
    print(f"adopt {proposed}: {d['adopt']}")
    print(f"written: {out / table_name}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
