"""Choosing the kernel handed to the SVM: nested cross-validation on the training part.

Data flow: training part (X, y) -> candidates (the untrained encoding; bandwidth-only
training; full training at several points of its trajectory; each for one or more
objectives) -> stratified K-fold inner cross-validation in which every learned candidate is
trained anew on the fold's training rows only, and scored by the accuracy of an SVM (C
tuned inside the fold) on the fold's held-out rows -> a rule (default "paired") -> the
chosen candidate's parameters, learned on the whole training part.

No test row is ever seen: a repeated split calls ``learn_and_select`` on its own training
part. The untrained encoding is always a candidate. With the default rule the best
learned candidate replaces it only when, on the same inner folds, its gain over the
untrained encoding exceeds one corrected standard error of that paired difference. The
rule was adopted by a decision stated before a confirmation run on data new to the
project (experiments/rule_check.py, round 2).

References:
  Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed. (2009),
  section 7.10 (cross-validation; the one-standard-error rule).
  Nadeau & Bengio, Machine Learning 52, 239 (2003) (the corrected resampled variance).
  Cawley & Talbot, JMLR 11, 2079 (2010) (selection bias without nested cross-validation).
"""

from __future__ import annotations

import concurrent.futures
import math
from typing import Callable, NamedTuple

import numpy as np

from hilbertune.circuits import PARAM_NAMES, Blueprint
from hilbertune.errors import InvalidInputError

SCOPES = ("untrained", "rescaled", "bandwidth", "full")
RULES = ("one_standard_error", "best_or_untrained", "paired", "best")
SCOPE_TEXT = {"untrained": "the encoding at its initial parameters (nothing learned)",
              "rescaled": "the untrained encoding with its bandwidth multiplied by a factor "
                          "(a grid searched by inner CV, as the RBF SVM's gamma is)",
              "bandwidth": "only the bandwidth learned",
              "full": "weights, biases and bandwidth learned"}


class SelectionSettings(NamedTuple):
    """What ``learn_and_select`` compares, and how (plain, hashable data)."""

    # the defaults come from experiments/accuracy_study.py (set D of its results)
    scopes: tuple = ("untrained", "rescaled", "full")  # which of SCOPES are candidates
    #                                                   ("untrained" is always added)
    objectives: tuple = ()  # of the learned candidates; () = the training objective and
    #                         ridge_loo (with the default objective: set D of the study)
    trajectory: tuple = (0.25, 1.0)  # fractions of training.steps at which full training is a
    #                                  candidate (early stopping on inner-CV accuracy)
    folds: int = 5  # stratified inner folds on the training part
    repeats: int = 0  # times the K-fold split is drawn anew; 0 = enough for MIN_PREDICTIONS
    rule: str = "paired"  # one of RULES; "paired" since rule_check round 2 (README)
    c_grid: tuple = (0.01, 0.1, 1.0, 10.0, 100.0, 1000.0)  # SVM C values tuned in each fold
    c_folds: int = 3  # folds of the C search inside each inner fold
    workers: int = 1  # inner folds trained at the same time (threads)
    bandwidth_factors: tuple = (0.25, 0.5, 2.0, 4.0)  # factors of the "rescaled" candidates


#: With ``repeats = 0`` the inner K-fold split is repeated (new shuffles) until every
#: candidate has been scored on at least this many held-out predictions, at most
#: MAX_REPEATS times: on small training parts one K-fold split leaves the accuracy
#: estimate at the mercy of the fold assignment (repeated cross-validation, common
#: practice; e.g. Kohavi, IJCAI 1995, from memory). 200 predictions give a binomial
#: standard error of at most 3.5 points.
MIN_PREDICTIONS = 200
MAX_REPEATS = 5


def repeats_for(n_rows: int, settings: "SelectionSettings",
                min_predictions: int = MIN_PREDICTIONS) -> int:
    """Repeats of the inner K-fold split for a training part of ``n_rows`` rows
    (``min_predictions``: held-out predictions per candidate that automatic repeats reach)."""
    if settings.repeats:
        return int(settings.repeats)
    return int(min(MAX_REPEATS, max(1, math.ceil(min_predictions / max(n_rows, 1)))))


def corrected_standard_error(fold_accuracies, folds: int) -> float:
    """Standard error of a cross-validated accuracy, corrected for overlapping training sets.

    ``sd * sqrt(1 / J + n_test / n_train)`` over the J = repeats * folds held-out scores,
    with ``n_test / n_train = 1 / (folds - 1)`` for K-fold splits (Nadeau & Bengio, Machine
    Learning 52, 239 (2003), the variance behind the corrected resampled t-test). The naive
    ``sd / sqrt(J)`` treats the folds as independent although their training sets share
    most rows, so it understates the uncertainty, and the more so the more repeats.
    """
    values = np.asarray(fold_accuracies, dtype=np.float64)
    if values.size < 2:
        return 0.0
    return float(values.std(ddof=1) * math.sqrt(1.0 / values.size + 1.0 / (folds - 1)))


class Candidate(NamedTuple):
    """One kernel that selection may hand to the SVM."""

    name: str  # e.g. "untrained", "rescaled x0.5", "bandwidth/centered_alignment",
    #            "full/ridge_loo@15"
    scope: str  # one of SCOPES
    objective: str  # "" for the untrained and rescaled encodings
    steps: int  # optimizer steps (the trajectory point); 0 when nothing is trained
    factor: float = 1.0  # bandwidth factor of a "rescaled" candidate


class CandidateScore(NamedTuple):
    """Inner cross-validation accuracy of one candidate."""

    candidate: Candidate
    trainable_parameters: int  # numbers the candidate learns (0 for the untrained encoding)
    fold_accuracies: tuple  # held-out accuracy of each inner fold
    mean: float  # mean over the folds
    sd: float  # standard deviation over the folds (ddof = 1)
    se: float  # standard error of the mean, corrected (``corrected_standard_error``)


class Selection(NamedTuple):
    """What ``learn_and_select`` returns (arrays are numpy)."""

    scores: tuple  # CandidateScore per candidate, simplest first
    best: str  # name of the candidate with the highest mean inner-CV accuracy
    chosen: str  # name of the candidate chosen by the rule
    reason: str  # the choice in words
    params: dict  # candidate name -> parameters learned on the whole training part
    runs: dict  # "scope/objective" -> TrainingResult on the whole training part
    folds: int  # inner folds used
    rule: str  # the rule used
    repeats: int = 1  # times the K-fold split was drawn

    @property
    def chosen_score(self) -> CandidateScore:
        return next(s for s in self.scores if s.candidate.name == self.chosen)

    def run_of(self, name: str):
        """TrainingResult that produced a candidate (None for the untrained encoding)."""
        score = next(s for s in self.scores if s.candidate.name == name)
        key = f"{score.candidate.scope}/{score.candidate.objective}"
        return self.runs.get(key)


# --------------------------------------------------------------------------- candidates

def _trainable(blueprint: Blueprint, freeze) -> tuple:
    frozen = set(blueprint.frozen) | set(freeze)
    sizes = {"weights": blueprint.n_slots, "biases": blueprint.n_slots, "log_bandwidth": 1}
    return tuple(n for n in PARAM_NAMES if n not in frozen and sizes[n] > 0)


def scope_freeze(scope: str, freeze=()) -> tuple:
    """Parameter names a scope leaves untrained (on top of the user's ``freeze``)."""
    if scope == "bandwidth":
        return tuple(dict.fromkeys(tuple(freeze) + ("weights", "biases")))
    return tuple(freeze)


def trajectory_steps(steps: int, fractions) -> tuple:
    """Step counts of the trajectory points: round(f * steps), at least 1, distinct."""
    return tuple(sorted({max(1, int(round(f * steps))) for f in fractions}))


def check_settings(settings: SelectionSettings, training_objective: str = "") -> None:
    """Refuse settings that cannot work, with the fix in the message."""
    from hilbertune import objectives

    unknown = [s for s in settings.scopes if s not in SCOPES]
    if unknown:
        raise InvalidInputError(f"unknown selection candidate(s) {unknown}; use some of "
                                f"{', '.join(SCOPES)}")
    for name in settings.objectives:
        objectives.resolve_objective(name)
    if settings.rule not in RULES:
        raise InvalidInputError(f"unknown selection rule {settings.rule!r}; use one of "
                                f"{', '.join(RULES)}")
    if not settings.trajectory or any(not (0 < f <= 1) for f in settings.trajectory):
        raise InvalidInputError(f"selection trajectory must be fractions in (0, 1], got "
                                f"{list(settings.trajectory)!r}")
    if settings.folds < 2:
        raise InvalidInputError(f"selection needs at least 2 inner folds, got {settings.folds}")
    if settings.repeats < 0:
        raise InvalidInputError(f"selection repeats must be 0 (automatic) or more, got "
                                f"{settings.repeats}")
    if any(not (f > 0 and math.isfinite(f)) or f == 1 for f in settings.bandwidth_factors):
        raise InvalidInputError(f"bandwidth factors must be positive numbers other than 1, got "
                                f"{list(settings.bandwidth_factors)!r}")
    if settings.c_folds < 2 or not settings.c_grid:
        raise InvalidInputError("selection needs a non-empty C grid and at least 2 C folds")


def candidates_for(blueprint: Blueprint, training, settings: SelectionSettings) -> tuple:
    """Candidates in order of complexity (simplest first); the untrained one is first.

    A scope is skipped when it would learn nothing new (every parameter of it frozen, or
    "full" learning the same parameters as "bandwidth").
    """
    chosen_objectives = tuple(settings.objectives) or tuple(
        dict.fromkeys((training.objective, "ridge_loo")))
    out = [Candidate("untrained", "untrained", "", 0)]
    if "rescaled" in settings.scopes and "log_bandwidth" not in (
            set(blueprint.frozen) | set(training.freeze)):
        # closest to the heuristic first: a smaller change is the simpler candidate
        for factor in sorted(settings.bandwidth_factors, key=lambda f: abs(math.log(f))):
            out.append(Candidate(f"rescaled x{factor:g}", "rescaled", "", 0, float(factor)))
    seen = {()}
    for scope in ("bandwidth", "full"):
        if scope not in settings.scopes:
            continue
        names = _trainable(blueprint, scope_freeze(scope, training.freeze))
        if names in seen:
            continue
        seen.add(names)
        points = ((training.steps,) if scope == "bandwidth"
                  else trajectory_steps(training.steps, settings.trajectory))
        for steps in points:
            for objective in chosen_objectives:
                suffix = "" if scope == "bandwidth" else f"@{steps}"
                out.append(Candidate(f"{scope}/{objective}{suffix}", scope, objective, steps))
    return tuple(out)


def trainable_count(blueprint: Blueprint, candidate: Candidate, freeze=()) -> int:
    """How many numbers a candidate learns."""
    if candidate.scope == "untrained":
        return 0
    if candidate.scope == "rescaled":
        return 1
    sizes = {"weights": blueprint.n_slots, "biases": blueprint.n_slots, "log_bandwidth": 1}
    return sum(sizes[n] for n in _trainable(blueprint, scope_freeze(candidate.scope, freeze)))


# --------------------------------------------------------------------------- the rule

def one_standard_error_choice(scores, rule: str = "one_standard_error", folds: int = 0):
    """(best, chosen) indices into ``scores`` (ordered simplest first).

    ``folds`` (K of the inner K-fold splits) is needed by ``rule="paired"`` only.

    ``best`` has the highest mean accuracy (the simplest among ties). With the
    one-standard-error rule the chosen one is the simplest candidate whose mean is at least
    ``mean_best - se_best`` (Hastie, Tibshirani & Friedman 2009, section 7.10: "choose the
    most parsimonious model whose error is no more than one standard error above the error
    of the best model"); with ``rule="best"`` it is ``best``. ``rule="best_or_untrained"``
    is the same rule with two levels of complexity only, nothing learned (``scores[0]``,
    the untrained encoding) and learned: ``best`` unless the untrained encoding's mean is
    within one standard error of it. ``rule="paired"`` asks the same question on the same
    folds: ``best`` when its mean fold-by-fold gain over the untrained encoding exceeds one
    corrected standard error of that paired difference (``paired_gain``), otherwise the
    untrained encoding. The folds are shared, so the fold-to-fold spread that both
    candidates feel cancels in the difference (the paired, corrected resampled t-statistic
    of Nadeau & Bengio 2003, compared with 1).
    """
    means = [s.mean for s in scores]
    best = int(np.argmax(means))  # argmax takes the first maximum: the simplest of ties
    if rule == "best":
        return best, best
    if rule == "best_or_untrained":
        keep = scores[0].mean >= scores[best].mean - scores[best].se - 1e-12
        return best, 0 if keep else best
    if rule == "paired":
        if folds < 2:
            raise ValueError("the paired rule needs the inner folds K (folds >= 2)")
        gain, se = paired_gain(scores[best], scores[0], folds)
        return best, best if best and gain > se + 1e-12 else 0
    threshold = scores[best].mean - scores[best].se
    chosen = next(i for i, s in enumerate(scores) if s.mean >= threshold - 1e-12)
    return best, chosen


def paired_gain(score: CandidateScore, untrained: CandidateScore, folds: int) -> tuple:
    """(mean, corrected standard error) of ``score``'s fold-by-fold gain over ``untrained``.

    Both were scored on the same inner folds (``folds``-fold splits, repeated), in the same
    order; the standard error is ``corrected_standard_error`` of the J differences (Nadeau
    & Bengio 2003).
    """
    diff = (np.asarray(score.fold_accuracies, dtype=np.float64)
            - np.asarray(untrained.fold_accuracies, dtype=np.float64))
    return float(diff.mean()), corrected_standard_error(diff, folds)


def _reason(scores, best: int, chosen: int, rule: str, folds: int, repeats: int = 1) -> str:
    b, c = scores[best], scores[chosen]
    times = f" x {repeats} repeats" if repeats > 1 else ""
    text = (f"{b.candidate.name} has the highest mean inner-CV accuracy ({b.mean:.3f}, "
            f"standard error {b.se:.3f} over {folds} folds{times} of the training part)")
    if rule == "best":
        return text + "; it is chosen (rule: highest mean)."
    if rule == "paired":
        if best == 0:
            return text + "; it is the untrained encoding, so nothing learned is kept."
        gain, se = paired_gain(b, scores[0], folds)
        rule_text = (f"on the same inner folds it beats the untrained encoding by "
                     f"{100 * gain:+.1f} points, standard error of the paired difference "
                     f"{100 * se:.1f}")
        if chosen == best:
            return text + f"; {rule_text}, more than one standard error, so it is chosen " \
                "(paired rule; Nadeau & Bengio 2003)."
        return text + f"; {rule_text}, not more than one standard error, so nothing learned " \
            "is kept (paired rule; Nadeau & Bengio 2003)."
    if rule == "best_or_untrained":
        if best == 0:
            return text + "; it is the untrained encoding, so nothing learned is kept."
        u = scores[0]
        rule_text = ("(one-standard-error rule with two levels of complexity, nothing learned "
                     "and learned; Hastie et al. 2009, 7.10).")
        if chosen == best:
            return text + (f"; it beats the untrained encoding ({u.mean:.3f}) by more than one "
                           "standard error, so it is chosen " + rule_text)
        return text + (f"; the untrained encoding ({u.mean:.3f}) is within one standard error "
                       "of it, so nothing learned is kept " + rule_text)
    if chosen == best:
        simpler = [s.candidate.name for s in scores[:chosen]]
        tail = (f"; no simpler candidate ({', '.join(simpler)}) comes within one standard "
                "error of it, so it is chosen" if simpler else "; it is the simplest "
                "candidate, so it is chosen")
    else:
        tail = (f"; {c.candidate.name} ({c.mean:.3f}) is within one standard error of it and "
                "is simpler, so it is chosen")
    return text + tail + " (one-standard-error rule, Hastie et al. 2009, 7.10)."


# --------------------------------------------------------------------------- scoring

def fold_accuracy(K, train_rows, test_rows, y, *, c_grid, c_folds: int, seed: int) -> float:
    """Held-out accuracy of ``SVC(kernel="precomputed")`` with C tuned on the fold's rows.

    ``K`` is the Gram of all rows of the training part [N, N]; the SVM sees only
    ``K[train_rows][:, train_rows]`` and its labels while C is chosen (stratified
    ``c_folds``-fold grid search, ``training.tune_svm_c``).
    """
    from sklearn.svm import SVC
    from hilbertune.training import tune_svm_c

    y = np.asarray(y)
    k_train = K[np.ix_(train_rows, train_rows)]
    smallest = int(np.unique(y[train_rows], return_counts=True)[1].min())
    if smallest >= 2:
        C = tune_svm_c(k_train, y[train_rows], c_grid=c_grid, cv=min(c_folds, smallest),
                       seed=seed).C
    else:
        C = 1.0  # a class with one row: no search possible; a neutral default
    model = SVC(kernel="precomputed", C=C).fit(k_train, y[train_rows])
    return float(np.mean(model.predict(K[np.ix_(test_rows, train_rows)]) == y[test_rows]))


def inner_folds(y, folds: int, seed: int):
    """Stratified (train rows, held-out rows) pairs; refuses folds above the smallest class."""
    from sklearn.model_selection import StratifiedKFold

    _, counts = np.unique(np.asarray(y), return_counts=True)
    if folds > counts.min():
        raise InvalidInputError(f"selection.folds = {folds} but the smallest class has only "
                                f"{int(counts.min())} training rows; lower selection.folds to "
                                f"at most {int(counts.min())} or add rows")
    splitter = StratifiedKFold(n_splits=folds, shuffle=True, random_state=int(seed))
    return list(splitter.split(np.zeros((len(y), 1)), np.asarray(y)))


# --------------------------------------------------------------------------- the whole step

def learn_and_select(blueprint: Blueprint, X, y, training, settings: SelectionSettings, *,
                     seed: int, gram: Callable, checkpoint_dir: str | None = None,
                     progress: bool = False, memory_budget=None) -> Selection:
    """Learn every candidate and choose one by nested inner cross-validation.

    Args:
      blueprint: the encoding circuit.
      X: float array [N, F] (the training part only); y: labels [N].
      training: ``TrainingSettings`` of the learned candidates (scope and objective and step
        count are set per candidate).
      settings: ``SelectionSettings``.
      seed: drives the inner folds, the C searches and every training.
      gram: ``gram(params, X) -> float64 array [N, N]``, the kernel the SVM will use.
      checkpoint_dir: checkpoints of the trainings on the whole training part (one
        subfolder per scope and objective), for resuming a killed run.

    Returns:
      ``Selection``.
    """
    from hilbertune.training import starting_params, train_encoding

    check_settings(settings, training.objective)
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y)
    n_repeats = repeats_for(len(y), settings)
    # repeat r shuffles with seed + 7919 r (a prime step keeps the seeds of neighbouring
    # runs, seed and seed + 1, from sharing their later repeats)
    folds = [pair for r in range(n_repeats)
             for pair in inner_folds(y, settings.folds, seed + 7919 * r)]
    candidates = candidates_for(blueprint, training, settings)
    start = starting_params(blueprint, X, y, training, seed=seed)
    fixed = {"untrained": start}
    for c in candidates:
        if c.scope == "rescaled":
            fixed[c.name] = {**start, "log_bandwidth": np.asarray(
                start["log_bandwidth"] + np.float32(math.log(c.factor)), np.float32)}
    runs = {}  # "scope/objective" -> (settings, snapshot steps)
    for c in candidates:
        if c.name in fixed:
            continue
        key = f"{c.scope}/{c.objective}"
        steps = runs[key][1] + (c.steps,) if key in runs else (c.steps,)
        settings_c = training._replace(objective=c.objective, steps=max(steps),
                                       freeze=scope_freeze(c.scope, training.freeze))
        runs[key] = (settings_c, steps)

    def learn(rows, *, final=False):
        """Candidate name -> parameters learned on X[rows] (plus the training results)."""
        params, results = dict(fixed), {}
        for key, (settings_c, steps) in runs.items():
            result = train_encoding(
                blueprint, X[rows], y[rows], settings_c, seed=seed, params=start,
                snapshots=steps, memory_budget=memory_budget,
                checkpoint_dir=(None if not (final and checkpoint_dir)
                                else f"{checkpoint_dir}/{key.replace('/', '-')}"),
                progress=progress and final)
            results[key] = result
            for c in candidates:
                if f"{c.scope}/{c.objective}" == key:
                    params[c.name] = result.snapshots[c.steps]
        return params, results

    fixed_grams = {name: gram(params, X) for name, params in fixed.items()}

    def score_fold(k):
        train_rows, test_rows = folds[k]
        learned, _ = learn(train_rows)
        out = []
        for c in candidates:
            K = fixed_grams[c.name] if c.name in fixed else gram(learned[c.name], X)
            out.append(fold_accuracy(K, train_rows, test_rows, y, c_grid=settings.c_grid,
                                     c_folds=settings.c_folds, seed=seed + k))
        return out

    if settings.workers > 1 and len(folds) > 1:
        with concurrent.futures.ThreadPoolExecutor(settings.workers) as pool:
            per_fold = list(pool.map(score_fold, range(len(folds))))
    else:
        per_fold = [score_fold(k) for k in range(len(folds))]
    accuracies = np.asarray(per_fold, dtype=np.float64).T  # [candidates, folds]
    scores = []
    for c, row in zip(candidates, accuracies):
        sd = float(row.std(ddof=1))
        scores.append(CandidateScore(c, trainable_count(blueprint, c, training.freeze),
                                     tuple(float(a) for a in row), float(row.mean()), sd,
                                     corrected_standard_error(row, settings.folds)))
    best, chosen = one_standard_error_choice(scores, settings.rule, settings.folds)
    params, results = learn(np.arange(len(y)), final=True)
    return Selection(tuple(scores), candidates[best].name, candidates[chosen].name,
                     _reason(scores, best, chosen, settings.rule, settings.folds,
                             n_repeats), params, results, settings.folds, settings.rule,
                     n_repeats)
