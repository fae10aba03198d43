"""The stages of a fit, as named functions with typed inputs and outputs.

Data flow (``runs.execute_fit`` calls these in order and writes the run directory):

  config (dict) --settings_from_config--> FitSettings (typed, parsed once)
  dataset --split_part--> data.Split (preprocessing fitted on the training part only)
  Split --learn_part--> selection.Selection (candidates learned and chosen by nested
                        inner cross-validation on the training part)
  Split + Selection --evaluate_part--> PartResult (frozen kernels, SVMs, accuracies of the
                        chosen and the untrained kernel and of the tuned classical SVMs)
  PartResult of every repeated split --compare_parts--> significance (corrected resampled
                        t-tests with Holm's correction)

A repeated split runs ``run_part``, the same code as the main split; no stage looks at the
test rows of its split before the accuracies are computed.
"""

from __future__ import annotations

import concurrent.futures
import time
from typing import NamedTuple

import numpy as np

from hilbertune.errors import InvalidInputError
from hilbertune.selection import SelectionSettings
from hilbertune.training import TrainingSettings

#: Order of the comparisons in the significance section (the first is the headline one).
COMPARISONS = (("learned_vs_untrained", "chosen", "untrained",
                "the chosen kernel", "the untrained quantum kernel"),
               ("quantum_vs_rbf_svm", "chosen", "rbf_svm",
                "the chosen quantum kernel", "the tuned RBF SVM"),
               ("quantum_vs_linear_svm", "chosen", "linear_svm",
                "the chosen quantum kernel", "the linear SVM"))

#: A second family, only when the encoding sees reduced features: the chosen quantum kernel
#: against the classical SVMs on every input column (what the reduction costs). Holm-
#: corrected within itself: it asks another question than the family above.
ALL_FEATURE_COMPARISONS = (
    ("quantum_vs_rbf_svm_all_features", "chosen", "rbf_svm_all_features",
     "the chosen quantum kernel", "the tuned RBF SVM on all input features"),
    ("quantum_vs_linear_svm_all_features", "chosen", "linear_svm_all_features",
     "the chosen quantum kernel", "the linear SVM on all input features"))


class FitSettings(NamedTuple):
    """Everything the stages need, parsed once from a resolved configuration."""

    seed: int  # drives every random choice
    test_fraction: float  # share of rows in each split's test part
    n_features: int  # features after reduction
    reduce: str  # "pca" or "first"
    kernel: str  # "fidelity" or "projected"
    gamma: float  # projected-kernel bandwidth
    memory_budget: str | int  # bytes or e.g. "4GiB"
    chunk_size: int | None  # state rows per chunk (None: automatic)
    training: TrainingSettings  # how learned candidates are trained
    selection: SelectionSettings  # which candidates and how one is chosen
    svm_C: float  # SVM C; 0 = tuned by cross-validation on the training part
    cv_folds: int  # folds for tuning C and the classical baselines
    repeats: int  # splits of the significance test (the main split is the first)
    alpha: float  # significance level (family-wise, Holm)
    workers: int  # threads for repeated splits and inner folds


class Evaluation(NamedTuple):
    """The chosen and the untrained kernel of one split, frozen into SVMs."""

    params: dict  # parameters of the chosen candidate
    k_train: np.ndarray  # chosen kernel, float64 [N_train, N_train]
    k_test: np.ndarray  # [N_test, N_train]
    k0_train: np.ndarray  # untrained kernel, [N_train, N_train]
    k0_test: np.ndarray
    model: object  # fitted SVC of the chosen kernel
    C: float  # its SVM constant
    C_tuned: bool  # True when C was chosen by cross-validation
    accuracies: dict  # test accuracy of "chosen" and "untrained"
    train_accuracy: float  # of the chosen kernel's SVM on its training rows


class PartResult(NamedTuple):
    """One split after learning, selection and evaluation (arrays are numpy float64)."""

    split_seed: int
    selection: object  # selection.Selection
    params: dict  # parameters of the chosen candidate
    k_train: np.ndarray  # chosen kernel, [N_train, N_train]
    k_test: np.ndarray  # [N_test, N_train]
    k0_train: np.ndarray  # untrained kernel, [N_train, N_train]
    k0_test: np.ndarray
    C: float  # SVM constant of the chosen kernel
    C_tuned: bool  # True when C was chosen by cross-validation
    model: object  # fitted SVC of the chosen kernel
    accuracies: dict  # test accuracy: chosen, untrained, rbf_svm, linear_svm (and
    #                   rbf_svm_all_features, linear_svm_all_features when reduced)
    train_accuracy: float  # of the chosen kernel's SVM on its training rows
    baselines: dict  # name -> diagnostics.BaselineResult
    seconds: dict  # stage -> wall seconds


def settings_from_config(config: dict, n_features: int) -> FitSettings:
    """Typed settings of a resolved configuration (``config.resolve_config``)."""
    t, enc, sel = config["training"], config["encoding"], config["selection"]
    training = TrainingSettings(
        objective=t["objective"], steps=t["steps"], learning_rate=t["learning_rate"],
        optimizer=t["optimizer"], schedule=t["schedule"], clip_norm=t["clip_norm"],
        batch_size=t["batch_size"], validation_fraction=t["validation_fraction"],
        patience=t["patience"], l2_penalty=t["l2_penalty"], ridge_lambda=t["ridge_lambda"],
        folds=t["folds"], freeze=tuple(t["freeze"]), checkpoint_every=t["checkpoint_every"],
        bandwidth=enc["bandwidth"] or None, bias_scale=enc["bias_scale"],
        kernel=enc["kind"], gamma=enc["gamma"], bandwidth_range=t["bandwidth_range"])
    workers = config["compute"]["workers"] or default_workers()
    selection = SelectionSettings(
        scopes=tuple(sel["candidates"]), objectives=tuple(sel["objectives"]),
        trajectory=tuple(sel["trajectory"]), folds=sel["folds"], rule=sel["rule"],
        repeats=sel["repeats"],
        bandwidth_factors=tuple(float(f) for f in sel["bandwidth_factors"]),
        c_folds=min(3, config["svm"]["cv_folds"]), workers=1)
    return FitSettings(
        seed=config["seed"], test_fraction=config["data"]["test_fraction"],
        n_features=n_features, reduce=config["data"]["reduce"], kernel=enc["kind"],
        gamma=enc["gamma"], memory_budget=config["compute"]["memory_budget"],
        chunk_size=config["compute"]["chunk_size"] or None, training=training,
        selection=selection, svm_C=config["svm"]["C"], cv_folds=config["svm"]["cv_folds"],
        repeats=config["evaluation"]["repeats"], alpha=config["evaluation"]["alpha"],
        workers=workers)


def default_workers() -> int:
    """Threads for independent splits: the cores this process may use, at most 4."""
    import os

    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    return max(1, min(4, cores))


# --------------------------------------------------------------------------- kernels

def gram_function(blueprint, settings: FitSettings):
    """``gram(params, X_a, X_b=None) -> float64 [N_a, N_b]`` of the kernel the SVM uses."""
    from hilbertune.kernels import projected_gram, quantum_gram

    def gram(params, X_a, X_b=None):
        if settings.kernel == "projected":
            K = projected_gram(blueprint, params, X_a, X_b, gamma=settings.gamma)
        else:
            K = quantum_gram(blueprint, params, X_a, X_b, memory_budget=settings.memory_budget,
                             chunk_size=settings.chunk_size)
        return np.asarray(K, np.float64)

    return gram


# --------------------------------------------------------------------------- stages

def split_part(dataset, settings: FitSettings, split_seed: int):
    """Stratified split from ``split_seed``; scaling and reduction fitted on its train part."""
    from hilbertune import data

    return data.split_and_scale(dataset.X, np.asarray(dataset.y),
                                test_fraction=settings.test_fraction, seed=split_seed,
                                n_components=settings.n_features, reduce=settings.reduce)


def learn_part(blueprint, split, settings: FitSettings, *, split_seed: int,
               checkpoint_dir=None, progress: bool = False):
    """Learn every candidate on the training part and choose one (``selection``)."""
    from hilbertune.selection import learn_and_select

    return learn_and_select(blueprint, split.X_train, split.y_train, settings.training,
                            settings.selection, seed=split_seed,
                            gram=gram_function(blueprint, settings),
                            checkpoint_dir=checkpoint_dir, progress=progress,
                            memory_budget=settings.memory_budget)


def fit_svm(k_train, y_train, settings: FitSettings, seed: int):
    """SVC on a precomputed kernel; C fixed, or tuned by CV on the training part."""
    from sklearn.svm import SVC

    from hilbertune.diagnostics import C_GRID
    from hilbertune.training import tune_svm_c

    C, tuned = settings.svm_C, settings.svm_C == 0
    if tuned:
        C = tune_svm_c(k_train, y_train, c_grid=C_GRID, cv=settings.cv_folds, seed=seed).C
    return SVC(kernel="precomputed", C=C).fit(k_train, y_train), float(C), tuned


def classical_baselines(split, settings: FitSettings, split_seed: int, X_all=None) -> dict:
    """Tuned RBF SVM and linear SVM on the identical split (C, gamma by CV on train only).

    They see the features the encoding sees. When those were reduced (PCA or the first
    columns) and ``X_all`` (every input column, [N, F]) is given, the same two SVMs also run
    on all F columns of the same rows, standardized on the training rows, with the RBF's
    gamma grid centred on 1/F (``gamma="scale"`` of scikit-learn for standardized data):
    ``rbf_svm_all_features`` and ``linear_svm_all_features``. They answer a different
    question, what the reduction to the encoding's width costs against classical kernels.
    """
    from sklearn.preprocessing import StandardScaler

    from hilbertune import diagnostics

    args = (split.X_train, split.y_train, split.X_test, split.y_test)
    out = {"rbf_svm": diagnostics.tuned_rbf_svm(*args, seed=split_seed, cv=settings.cv_folds),
           "linear_svm": diagnostics.linear_svm(*args, seed=split_seed, cv=settings.cv_folds)}
    if X_all is None or split.preprocessing.reduce == "none":
        return out
    X_all = np.asarray(X_all, dtype=np.float64)
    scaler = StandardScaler().fit(X_all[split.train_indices])
    full = (scaler.transform(X_all[split.train_indices]), split.y_train,
            scaler.transform(X_all[split.test_indices]), split.y_test)
    width = X_all.shape[1]
    gammas = tuple(g / width for g in diagnostics.GAMMA_GRID)
    out["rbf_svm_all_features"] = diagnostics.tuned_rbf_svm(
        *full, seed=split_seed, cv=settings.cv_folds, gamma_grid=gammas)
    out["linear_svm_all_features"] = diagnostics.linear_svm(*full, seed=split_seed,
                                                            cv=settings.cv_folds)
    return out


def evaluate_part(blueprint, split, selection, settings: FitSettings,
                  split_seed: int) -> Evaluation:
    """Frozen kernels of the chosen and untrained candidates, their SVMs and accuracies."""
    gram = gram_function(blueprint, settings)
    params = selection.params[selection.chosen]
    params0 = selection.params["untrained"]
    k0_train, k0_test = gram(params0, split.X_train), gram(params0, split.X_test, split.X_train)
    if selection.chosen == "untrained":
        k_train, k_test = k0_train, k0_test
    else:
        k_train, k_test = gram(params, split.X_train), gram(params, split.X_test, split.X_train)
    model, C, tuned = fit_svm(k_train, split.y_train, settings, split_seed)
    model0, _, _ = fit_svm(k0_train, split.y_train, settings, split_seed)
    accuracies = {"chosen": float(np.mean(model.predict(k_test) == split.y_test)),
                  "untrained": float(np.mean(model0.predict(k0_test) == split.y_test))}
    train_accuracy = float(np.mean(model.predict(k_train) == split.y_train))
    return Evaluation(params, k_train, k_test, k0_train, k0_test, model, C, tuned, accuracies,
                      train_accuracy)


def majority_rate(y_train, y_test) -> float:
    """Test accuracy of always answering the most common training class (ties: the first
    in sorted order): the floor any classifier must clear on imbalanced data."""
    values, counts = np.unique(np.asarray(y_train), return_counts=True)
    return float(np.mean(np.asarray(y_test) == values[int(np.argmax(counts))]))


def run_part(dataset, blueprint, settings: FitSettings, split_seed: int, *, split=None,
             checkpoint_dir=None, progress: bool = False) -> PartResult:
    """One split, whole: split, learn + select, evaluate, classical baselines."""
    seconds = {}
    started = time.perf_counter()
    split = split if split is not None else split_part(dataset, settings, split_seed)
    selection = learn_part(blueprint, split, settings, split_seed=split_seed,
                           checkpoint_dir=checkpoint_dir, progress=progress)
    seconds["learn_and_select"] = time.perf_counter() - started
    started = time.perf_counter()
    ev = evaluate_part(blueprint, split, selection, settings, split_seed)
    seconds["evaluate"] = time.perf_counter() - started
    started = time.perf_counter()
    baselines = classical_baselines(split, settings, split_seed, X_all=dataset.X)
    seconds["classical_baselines"] = time.perf_counter() - started
    accuracies = {**ev.accuracies, **{name: b.test_accuracy for name, b in baselines.items()},
                  "majority_class": majority_rate(split.y_train, split.y_test)}
    return PartResult(split_seed, selection, ev.params, ev.k_train, ev.k_test, ev.k0_train,
                      ev.k0_test, ev.C, ev.C_tuned, ev.model, accuracies, ev.train_accuracy,
                      baselines, seconds)


def all_parts(dataset, blueprint, settings: FitSettings, *, main_split=None,
              checkpoint_dir=None, progress: bool = False, on_done=None) -> list:
    """The main split (seed) and ``repeats - 1`` more (seeds seed + 1, seed + 2, ...), each
    with its own learning and selection, run by the same function ``run_part``.

    Independent splits run in ``settings.workers`` threads (JAX and libsvm release the
    interpreter while they compute); each split's result does not depend on the order.
    Only the main split writes checkpoints and shows training progress. ``on_done()`` is
    called after each split finishes (for a progress display).
    """
    seeds = [settings.seed + r for r in range(settings.repeats)]

    def one(split_seed):
        main = split_seed == settings.seed
        part = run_part(dataset, blueprint, settings, split_seed,
                        split=main_split if main else None,
                        checkpoint_dir=checkpoint_dir if main else None,
                        progress=progress and main and settings.workers == 1)
        if on_done is not None:
            on_done()
        return part

    if settings.workers > 1:
        with concurrent.futures.ThreadPoolExecutor(settings.workers) as pool:
            return list(pool.map(one, seeds))
    return [one(s) for s in seeds]


# --------------------------------------------------------------------------- significance

def holm_adjust(p_values) -> list:
    """Holm's step-down adjusted p-values (Holm, Scand. J. Statist. 6, 65 (1979)).

    Sort the m p-values ascending; the i-th (0-based) is multiplied by (m - i); adjusted
    values are made non-decreasing by a running maximum and capped at 1. Rejecting where the
    adjusted p < alpha controls the family-wise error rate at alpha. ``None`` entries (a
    test without a variance estimate) stay None and do not count in m.
    """
    indexed = [(p, i) for i, p in enumerate(p_values) if p is not None]
    m = len(indexed)
    out = [None] * len(p_values)
    running = 0.0
    for rank, (p, i) in enumerate(sorted(indexed)):
        running = max(running, min(1.0, (m - rank) * p))
        out[i] = running
    return out


def compare_parts(parts, settings: FitSettings) -> dict:
    """Paired corrected resampled t-tests over the splits, Holm-corrected as one family.

    Comparisons: chosen vs untrained quantum kernel (did learning help?), and the chosen
    quantum kernel vs every classical baseline. The top-level fields describe the
    comparison with the tuned RBF SVM (the contract of ``summary.json``).
    """
    from hilbertune import diagnostics

    n_train = len(parts[0].k_train)
    n_test = len(parts[0].k_test)
    names = ["chosen", "untrained", "rbf_svm", "linear_svm"]
    if all("majority_class" in p.accuracies for p in parts):
        names.append("majority_class")  # a reference row, not tested
    reduced = all("rbf_svm_all_features" in p.accuracies for p in parts)
    if reduced:
        names += ["rbf_svm_all_features", "linear_svm_all_features"]
    per_repeat = {name: [p.accuracies[name] for p in parts] for name in names}

    def family(comparisons) -> dict:
        tests = {}
        for key, a, b, label_a, label_b in comparisons:
            diff = np.asarray(per_repeat[a]) - np.asarray(per_repeat[b])
            tests[key] = diagnostics.corrected_resampled_t_test(diff, n_train, n_test)
            tests[key].update(a=label_a, b=label_b)
        adjusted = holm_adjust([t["p_value"] for t in tests.values()])
        for (key, *_), p_holm in zip(comparisons, adjusted):
            t = tests[key]
            t["p_holm"] = p_holm
            t["significant"] = bool(p_holm is not None and p_holm < settings.alpha)
            t["verdict"] = comparison_verdict(t, settings.alpha)
        return tests

    tests = family(COMPARISONS)
    rbf = tests["quantum_vs_rbf_svm"]
    all_features = None
    if reduced:
        all_features = {
            "comparisons": family(ALL_FEATURE_COMPARISONS),
            "correction": f"Holm (1979) step-down over these {len(ALL_FEATURE_COMPARISONS)} "
                          "comparisons (a separate family: what the reduction costs)"}
    return {
        "test": rbf["test"], "correction": "Holm (1979) step-down over the "
                                           f"{len(COMPARISONS)} comparisons",
        "alpha": settings.alpha, "baseline": "tuned RBF SVM",
        "mean_difference": rbf["mean_difference"], "t_statistic": rbf["t_statistic"],
        "dof": rbf["dof"], "p_value": rbf["p_value"], "p_holm": rbf["p_holm"],
        "verdict": rbf["verdict"] + " " + diagnostics.SIMULATION_CAVEAT,
        "learning_verdict": tests["learned_vs_untrained"]["verdict"],
        "caveat": diagnostics.SIMULATION_CAVEAT,
        "comparisons": tests,
        "repeats": len(parts), "split_seeds": [p.split_seed for p in parts],
        "n_train": n_train, "n_test": n_test,
        "chosen_per_repeat": [p.selection.chosen for p in parts],
        "all_features": all_features,
        "per_repeat": {("quantum" if k == "chosen" else k): [float(v) for v in vals]
                       for k, vals in per_repeat.items()},
    }


def comparison_verdict(test: dict, alpha: float) -> str:
    """One plain sentence: significant (after Holm) or not, with the mean difference."""
    mean, p = test["mean_difference"], test.get("p_holm")
    a, b = test["a"], test["b"]
    if p is None:
        return (f"No significant difference can be established between {a} and {b}: every "
                f"split gave the same difference ({mean:+.3f}), so the test has no variance "
                "estimate.")
    if p < alpha and mean > 0:
        return (f"{a[0].upper() + a[1:]} is significantly more accurate than {b} (mean "
                f"difference {mean:+.3f}, Holm-adjusted p = {p:.3g} < {alpha}).")
    if p < alpha and mean < 0:
        return (f"{b[0].upper() + b[1:]} is significantly more accurate than {a} (mean "
                f"difference {mean:+.3f}, Holm-adjusted p = {p:.3g} < {alpha}).")
    return (f"No significant difference between {a} and {b} (mean difference {mean:+.3f}, "
            f"Holm-adjusted p = {p:.3g}, alpha = {alpha}).")


RULE_TEXT = {
    "one_standard_error": "one-standard-error rule (Hastie, Tibshirani & Friedman 2009, 7.10)",
    "best_or_untrained": "the best candidate unless the untrained encoding is within one "
                         "standard error of it (the one-standard-error rule of Hastie, "
                         "Tibshirani & Friedman 2009, 7.10, with two levels of complexity: "
                         "nothing learned, learned)",
    "paired": "the best candidate if, on the same inner folds, its gain over the untrained "
              "encoding exceeds one corrected standard error of the paired difference "
              "(Nadeau & Bengio 2003); otherwise the untrained encoding",
    "best": "highest mean"}


def selection_summary(selection) -> dict:
    """JSON-able account of the candidates, their inner-CV accuracy and the choice."""
    from hilbertune.selection import paired_gain

    rows = []
    untrained = selection.scores[0]
    for s in selection.scores:
        c = s.candidate
        gain, gain_se = paired_gain(s, untrained, selection.folds)
        row = {"name": c.name, "scope": c.scope, "objective": c.objective or None,
               "steps": c.steps, "bandwidth_factor": c.factor, "description": _describe(c),
               "trainable_parameters": s.trainable_parameters,
               "cv_accuracy_mean": s.mean, "cv_accuracy_sd": s.sd, "cv_accuracy_se": s.se,
               "cv_accuracy_folds": list(s.fold_accuracies),
               # fold-by-fold gain over the untrained encoding on the same inner folds
               # (what the "paired" rule weighs); None for the untrained encoding itself
               "cv_gain_over_untrained": None if s is untrained else gain,
               "cv_gain_over_untrained_se": None if s is untrained else gain_se}
        rows.append(row)
    chosen = selection.chosen_score
    return {"rule": RULE_TEXT.get(selection.rule, selection.rule),
            "folds": selection.folds, "repeats": selection.repeats, "candidates": rows,
            "best": selection.best,
            "chosen": selection.chosen, "reason": selection.reason,
            "cv_accuracy": chosen.mean, "cv_accuracy_sd": chosen.sd,
            "note": "inner cross-validation on the training part only: each learned "
                    "candidate was trained anew on each fold's training rows; the test rows "
                    "were not used"}


def _describe(candidate) -> str:
    from hilbertune.selection import SCOPE_TEXT

    text = SCOPE_TEXT[candidate.scope]
    if candidate.scope == "untrained":
        return text
    if candidate.scope == "rescaled":
        return f"the untrained encoding with its bandwidth multiplied by {candidate.factor:g}"
    return f"{text}, objective {candidate.objective}, {candidate.steps} steps at most"


def check_selection(settings: FitSettings, y_train) -> None:
    """Refuse selection settings that cannot run on this training part (before any work)."""
    from hilbertune import selection

    selection.check_settings(settings.selection, settings.training.objective)
    _, counts = np.unique(np.asarray(y_train), return_counts=True)
    if settings.selection.folds > counts.min():
        raise InvalidInputError(f"selection.folds = {settings.selection.folds} but the smallest "
                                f"class has only {int(counts.min())} training rows; lower "
                                f"selection.folds to at most {int(counts.min())} or add rows")
