"""Selection of the kernel by nested inner cross-validation (selection.py, pipeline.py)."""

import csv
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from sklearn.datasets import make_classification, make_moons

from hilbertune import data
from hilbertune.cli import main
from hilbertune.diagnostics import precomputed_svm
from hilbertune.encodings import build_encoding
from hilbertune.errors import InvalidInputError
from hilbertune.kernels import projected_gram, quantum_gram
from hilbertune.pipeline import holm_adjust
from hilbertune.selection import (Candidate, CandidateScore, SelectionSettings,
                                  candidates_for, corrected_standard_error, learn_and_select,
                                  one_standard_error_choice, paired_gain, repeats_for,
                                  trajectory_steps)
from hilbertune.training import TrainingSettings, train_encoding


def score(name, mean, se, scope="full", steps=10):
    return CandidateScore(Candidate(name, scope, "centered_alignment", steps), 1, (mean,), mean,
                          se * 2.0, se)


# --------------------------------------------------------------------------- the rule

def test_one_standard_error_choice_matches_a_hand_computation():
    # Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed. (2009),
    # 7.10: take the most parsimonious model within one standard error of the best.
    # By hand: best = c (0.86, se 0.03), threshold 0.86 - 0.03 = 0.83; a (0.80) is below,
    # b (0.83) reaches it and is simpler than c and d, so b is chosen.
    scores = [score("a", 0.80, 0.02, "untrained", 0), score("b", 0.83, 0.01, "bandwidth"),
              score("c", 0.86, 0.03), score("d", 0.85, 0.02, steps=60)]
    assert one_standard_error_choice(scores) == (2, 1)
    assert one_standard_error_choice(scores, "best") == (2, 2)
    # with a tiny standard error of the best nothing simpler is close enough
    tight = scores[:2] + [score("c", 0.86, 0.001), scores[3]]
    assert one_standard_error_choice(tight) == (2, 2)
    # ties of the best go to the simpler candidate
    tie = [score("a", 0.9, 0.0, "untrained", 0), score("b", 0.9, 0.0)]
    assert one_standard_error_choice(tie) == (0, 0)


def test_best_or_untrained_matches_a_hand_computation():
    # The same rule (Hastie et al. 2009, 7.10) with two complexity levels: untrained, learned.
    # By hand, with the scores above: best = c (0.86, se 0.03); the untrained a (0.80) is
    # below 0.86 - 0.03 = 0.83, so c itself is chosen (b, simpler than c but learned, is
    # not preferred: among learned candidates no order of simplicity is claimed).
    scores = [score("a", 0.80, 0.02, "untrained", 0), score("b", 0.83, 0.01, "bandwidth"),
              score("c", 0.86, 0.03), score("d", 0.85, 0.02, steps=60)]
    assert one_standard_error_choice(scores, "best_or_untrained") == (2, 2)
    # a reaches the threshold when the best's standard error is 0.06: keep the untrained
    wide = scores[:2] + [score("c", 0.86, 0.06), scores[3]]
    assert one_standard_error_choice(wide, "best_or_untrained") == (2, 0)
    # the untrained encoding best: kept
    assert one_standard_error_choice([score("a", 0.9, 0.01, "untrained", 0),
                                      score("b", 0.8, 0.01)], "best_or_untrained") == (0, 0)


def folds_score(name, accuracies, scope="full"):
    acc = np.asarray(accuracies, float)
    return CandidateScore(Candidate(name, scope, "", 0), 1, tuple(acc), float(acc.mean()),
                          float(acc.std(ddof=1)), corrected_standard_error(acc, 5))


def test_paired_rule_matches_a_hand_computation_and_scipy():
    # A learned candidate 4 points above the untrained one on every fold: the paired
    # difference has no spread (gain 0.04, standard error 0), so it is kept, although the
    # unpaired rule keeps the untrained one: learned mean 0.84 - its corrected se
    # 0.0791 * sqrt(1/5 + 1/4) = 0.053 is below the untrained 0.80 (by hand).
    untrained = folds_score("untrained", [0.70, 0.80, 0.90, 0.75, 0.85], "untrained")
    steady = folds_score("steady", [0.74, 0.84, 0.94, 0.79, 0.89])
    assert paired_gain(steady, untrained, 5) == pytest.approx((0.04, 0.0), abs=1e-12)
    assert one_standard_error_choice([untrained, steady], "paired", 5) == (1, 1)
    assert one_standard_error_choice([untrained, steady], "best_or_untrained") == (1, 0)
    # Differences (+0.10, -0.06, +0.08, -0.04, +0.02): mean 0.02, sd sqrt(0.02 / 4) = 0.0707,
    # corrected se 0.0707 * sqrt(1/5 + 1/4) = 0.0474 > 0.02 (by hand): untrained kept.
    noisy = folds_score("noisy", [0.80, 0.74, 0.98, 0.71, 0.87])
    gain, se = paired_gain(noisy, untrained, 5)
    assert (gain, se) == pytest.approx((0.02, math.sqrt(0.005) * math.sqrt(0.45)), abs=1e-12)
    assert one_standard_error_choice([untrained, noisy], "paired", 5) == (1, 0)
    # gain / se is the corrected resampled t-statistic of Nadeau & Bengio (Machine Learning
    # 52, 239, 2003): scipy.stats.ttest_rel's t times sqrt((1/J) / (1/J + 1/(K-1))).
    from scipy import stats

    t = stats.ttest_rel(noisy.fold_accuracies, untrained.fold_accuracies).statistic
    assert gain / se == pytest.approx(t * math.sqrt(0.2 / 0.45), rel=1e-9)
    with pytest.raises(ValueError, match="folds"):
        one_standard_error_choice([untrained, noisy], "paired")


@pytest.mark.parametrize("rule", ["one_standard_error", "best_or_untrained", "paired"])
@settings(max_examples=200, deadline=None)
@given(st.lists(st.lists(st.integers(0, 10), min_size=3, max_size=3), min_size=2, max_size=6))
def test_the_choice_is_never_below_the_untrained_kernel_by_more_than_one_standard_error(
        rule, folds):
    scores = []
    for i, correct in enumerate(folds):
        acc = np.asarray(correct, float) / 10
        sd = float(acc.std(ddof=1))
        scores.append(CandidateScore(Candidate(f"c{i}", "untrained" if i == 0 else "full", "",
                                               i), i, tuple(acc), float(acc.mean()), sd,
                                     sd / np.sqrt(acc.size)))
    best, chosen = one_standard_error_choice(scores, rule, 3)
    if rule == "paired":  # the best or nothing learned; learned only with paired evidence
        assert chosen in (0, best)
        if chosen != 0:
            gain, se = paired_gain(scores[best], scores[0], 3)
            assert gain > se and scores[best].mean > scores[0].mean
        return
    assert scores[chosen].mean >= scores[0].mean - scores[best].se - 1e-12
    assert scores[chosen].mean >= scores[best].mean - scores[best].se - 1e-12
    assert chosen <= best  # never more complex than the best
    if rule == "best_or_untrained":
        assert chosen in (0, best)
        if chosen != 0:  # learned only with evidence: more than one SE above the untrained
            assert scores[best].mean - scores[0].mean > scores[best].se


def test_holm_adjustment_matches_a_hand_computation():
    # Holm, Scand. J. Statist. 6, 65 (1979): sorted p (0.01, 0.03, 0.04) times (3, 2, 1)
    # -> 0.03, 0.06, 0.04, then a running maximum -> 0.03, 0.06, 0.06 (by hand)
    assert holm_adjust([0.01, 0.04, 0.03]) == pytest.approx([0.03, 0.06, 0.06])
    assert holm_adjust([0.5, 0.9]) == pytest.approx([1.0, 1.0])
    # a test without a variance estimate stays undecided and does not count in m
    assert holm_adjust([None, 0.02, 0.04]) == [None, pytest.approx(0.04), pytest.approx(0.04)]


# --------------------------------------------------------------------------- candidates

def test_candidates_are_ordered_simplest_first_and_skip_what_learns_nothing_new():
    blueprint = build_encoding("layered", 2, n_qubits=2, layers=1)
    training = TrainingSettings(steps=40)
    gradient_only = SelectionSettings(scopes=("untrained", "bandwidth", "full"),
                                      objectives=("centered_alignment",))
    names = [c.name for c in candidates_for(blueprint, training, gradient_only)]
    assert names == ["untrained", "bandwidth/centered_alignment",
                     "full/centered_alignment@10", "full/centered_alignment@40"]
    # the default set (experiments/accuracy_study.py, set D): rescaled bandwidths, then full
    # training with two objectives at a quarter of the steps and at the end
    names = [c.name for c in candidates_for(blueprint, training, SelectionSettings())]
    assert names == ["untrained", "rescaled x0.5", "rescaled x2", "rescaled x0.25",
                     "rescaled x4", "full/centered_alignment@10", "full/ridge_loo@10",
                     "full/centered_alignment@40", "full/ridge_loo@40"]
    # the untrained encoding is a candidate even when the user lists only "full"
    only_full = SelectionSettings(scopes=("full",), objectives=("ridge_loo", "alignment"))
    assert [c.name for c in candidates_for(blueprint, training, only_full)] == [
        "untrained", "full/ridge_loo@10", "full/alignment@10", "full/ridge_loo@40",
        "full/alignment@40"]
    # with weights and biases frozen, "full" would learn only the bandwidth again
    frozen = training._replace(freeze=("weights", "biases"))
    assert [c.scope for c in candidates_for(blueprint, frozen, gradient_only)] == [
        "untrained", "bandwidth"]
    assert trajectory_steps(60, (0.25, 0.5, 1.0)) == (15, 30, 60)
    assert trajectory_steps(2, (0.1, 0.25)) == (1,)


def small_problem(seed=0, n=60):
    X, y = make_moons(n, noise=0.2, random_state=seed)
    split = data.split_and_scale(X, y, test_fraction=0.3, seed=seed, n_components=2)
    blueprint = build_encoding("layered", 2, n_qubits=2, layers=1)

    def gram(params, A, B=None):
        return np.asarray(quantum_gram(blueprint, params, A, B), np.float64)

    return split, blueprint, gram


def test_selection_is_deterministic_and_independent_of_the_thread_count():
    split, blueprint, gram = small_problem()
    training = TrainingSettings(steps=6, patience=0)
    runs = [learn_and_select(blueprint, split.X_train, split.y_train, training,
                             SelectionSettings(folds=3, workers=w), seed=5, gram=gram)
            for w in (1, 2, 1)]
    for other in runs[1:]:
        assert other.chosen == runs[0].chosen and other.scores == runs[0].scores
        for name, params in runs[0].params.items():
            for key, value in params.items():
                assert np.asarray(other.params[name][key]).tobytes() == \
                    np.asarray(value).tobytes()


def test_learned_candidates_never_see_the_held_out_fold(monkeypatch):
    # every training inside the inner CV gets only the fold's training rows
    from hilbertune import training as training_module

    split, blueprint, gram = small_problem()
    seen = []
    original = training_module.train_encoding

    def spy(bp, X, y, *args, **kwargs):
        seen.append(np.asarray(X).shape[0])
        return original(bp, X, y, *args, **kwargs)

    monkeypatch.setattr(training_module, "train_encoding", spy)
    learn_and_select(blueprint, split.X_train, split.y_train, TrainingSettings(steps=3),
                     SelectionSettings(folds=3), seed=0, gram=gram)
    n = split.X_train.shape[0]
    repeats = repeats_for(n, SelectionSettings(folds=3))
    assert repeats == 5  # 42 rows: the 3-fold split is drawn 5 times (200 predictions)
    # 2 runs (full, two objectives) per fold on about 2/3 of the rows, then 2 on all rows
    assert sorted(seen)[-2:] == [n, n] and len(seen) == 2 * 3 * repeats + 2
    assert all(size < n for size in sorted(seen)[:-2])


def test_on_an_overfitting_setup_the_choice_stays_within_noise_of_the_untrained_kernel():
    # 40 training rows drawn 5 times from one noisy problem (15% of labels flipped), 4 qubits
    # x 3 layers: 73 trainable numbers trained hard. Fully learned kernels lose held-out
    # accuracy here on average; the choice must stay within noise of the untrained kernel
    # (360 held-out rows per draw: a binomial standard error of about 2.3 points per draw).
    X, y = make_classification(400, n_features=4, n_informative=2, n_redundant=0,
                               flip_y=0.15, class_sep=1.0, random_state=0)
    blueprint = build_encoding("layered", 4, n_qubits=4, layers=3)
    training = TrainingSettings(objective="centered_alignment", steps=150, learning_rate=0.1,
                                bias_scale=0.1, validation_fraction=0.0, patience=0)

    def gram(params, A, B=None):
        return np.asarray(quantum_gram(blueprint, params, A, B), np.float64)

    untrained, overfit, chosen = [], [], []
    for draw in range(5):
        split = data.split_and_scale(X, y, test_fraction=0.9, seed=draw, n_components=4)
        result = learn_and_select(blueprint, split.X_train, split.y_train, training,
                                  SelectionSettings(folds=4), seed=draw, gram=gram)

        def held_out(name):
            p = result.params[name]
            return precomputed_svm(gram(p, split.X_train),
                                   gram(p, split.X_test, split.X_train), split.y_train,
                                   split.y_test, seed=draw).test_accuracy

        untrained.append(held_out("untrained"))
        overfit.append(held_out("full/ridge_loo@150"))
        chosen.append(held_out(result.chosen))
    assert np.mean(overfit) < np.mean(untrained) - 0.03, \
        "the setup no longer overfits; make it harder so the test keeps its teeth"
    assert np.mean(chosen) >= np.mean(untrained) - 0.03


def test_corrected_standard_error_matches_nadeau_and_bengio():
    # Nadeau & Bengio, Machine Learning 52, 239 (2003): variance (1/J + n_test/n_train) s^2;
    # K-fold: n_test/n_train = 1/(K-1). By hand for (0.6, 0.8, 0.7, 0.9) with K = 4:
    # s = 0.129099..., sqrt(1/4 + 1/3) = 0.763763..., product 0.098601...
    assert corrected_standard_error([0.6, 0.8, 0.7, 0.9], folds=4) == pytest.approx(
        0.0986013, abs=1e-6)
    # more repeats of the split do not shrink it below the overlap term
    many = [0.6, 0.8, 0.7, 0.9] * 25
    assert corrected_standard_error(many, folds=4) > np.std(many, ddof=1) * math.sqrt(1 / 3)
    assert repeats_for(40, SelectionSettings()) == 5 and repeats_for(400, SelectionSettings()) == 1
    assert repeats_for(40, SelectionSettings(repeats=2)) == 2


# --------------------------------------------------------------------------- trained kernel

@pytest.mark.parametrize("kind", ["fidelity", "projected"])
def test_training_optimizes_the_kernel_the_svm_uses(kind):
    # the alignment in the training history equals an independent alignment of the Gram
    # that the SVM gets (kernels.quantum_gram / kernels.projected_gram, float64 numpy)
    split, blueprint, _ = small_problem(n=50)
    settings_ = TrainingSettings(steps=5, kernel=kind, gamma=0.7, validation_fraction=0.0,
                                 patience=0, objective="alignment")
    result = train_encoding(blueprint, split.X_train, split.y_train, settings_, seed=1)
    if kind == "projected":
        K = np.asarray(projected_gram(blueprint, result.params, split.X_train, gamma=0.7))
    else:
        K = np.asarray(quantum_gram(blueprint, result.params, split.X_train))
    Y = np.where(split.y_train[:, None] == split.y_train[None, :], 1.0, -1.0)
    # kernel-target alignment (Cristianini et al., NIPS 2001), computed here with numpy
    alignment = np.sum(K * Y) / (np.linalg.norm(K) * np.linalg.norm(Y))
    row = result.history[result.best_step]
    assert row["alignment"] == pytest.approx(alignment, rel=2e-4)


TINY = ["--set", "data.samples=60", "--set", "training.steps=4", "--set",
        "evaluation.repeats=2", "--set", "svm.cv_folds=2", "--set", "training.patience=0",
        "--set", "selection.folds=2", "--set", "hardware.enabled=false", "--quiet"]


@pytest.mark.parametrize("kind", ["fidelity", "projected"])
def test_history_alignment_equals_the_summary_alignment_for_both_kernel_kinds(kind, tmp_path):
    out = tmp_path / kind
    code = main(["fit", "--qubits", "2", "--seed", "3", "--out", str(out), *TINY,
                 "--set", f"encoding.kind={kind}", "--set", "training.validation_fraction=0",
                 "--set", "selection.candidates=['full']", "--set", "selection.trajectory=[1.0]",
                 "--set", "selection.objectives=['centered_alignment']"])
    assert code == 0
    summary = json.loads((out / "summary.json").read_text())
    with open(out / "history.csv") as stream:
        history = list(csv.DictReader(stream))
    full = next(c for c in summary["selection"]["candidates"] if c["scope"] == "full")
    assert summary["training"]["reported_run"] == "full/centered_alignment"
    # no validation part: the last step's parameters are the run's final ones
    assert float(history[-1]["alignment"]) == pytest.approx(full["alignment"], rel=2e-4)
    if summary["chosen_kernel"] == full["name"]:
        assert summary["alignment"]["final"] == pytest.approx(full["alignment"])


def test_fit_summary_lists_candidates_choice_and_corrected_comparisons(tmp_path):
    out = tmp_path / "run"
    assert main(["fit", "--qubits", "2", "--seed", "4", "--out", str(out), *TINY]) == 0
    summary = json.loads((out / "summary.json").read_text())
    sel = summary["selection"]
    names = [c["name"] for c in sel["candidates"]]
    assert names[0] == "untrained" and sel["chosen"] in names and sel["best"] in names
    assert summary["chosen_kernel"] == sel["chosen"]
    for c in sel["candidates"]:
        # 2 folds, drawn 5 times on 42 training rows (at least 200 held-out predictions)
        assert len(c["cv_accuracy_folds"]) == sel["folds"] * sel["repeats"] == 2 * 5
        assert c["cv_accuracy_mean"] == pytest.approx(np.mean(c["cv_accuracy_folds"]))
        # the paired gain is the mean of the fold-by-fold differences to the untrained
        # encoding (same folds, same order); none for the untrained encoding itself
        diff = np.subtract(c["cv_accuracy_folds"], sel["candidates"][0]["cv_accuracy_folds"])
        if c["name"] == "untrained":
            assert c["cv_gain_over_untrained"] is None
        else:
            assert c["cv_gain_over_untrained"] == pytest.approx(diff.mean())
            assert c["cv_gain_over_untrained_se"] == pytest.approx(
                corrected_standard_error(diff, sel["folds"]))
    sig = summary["significance"]
    assert set(sig["comparisons"]) == {"learned_vs_untrained", "quantum_vs_rbf_svm",
                                       "quantum_vs_linear_svm"}
    assert "Holm" in sig["correction"] and len(sig["chosen_per_repeat"]) == 2
    p = [sig["comparisons"][k]["p_value"] for k in sig["comparisons"]]
    adjusted = holm_adjust(p)
    assert [sig["comparisons"][k]["p_holm"] for k in sig["comparisons"]] == adjusted
    # the main split is the first repeated split: its accuracies are the summary's
    assert sig["per_repeat"]["quantum"][0] == summary["test_accuracy"]
    assert sig["per_repeat"]["untrained"][0] == summary["untrained_test_accuracy"]
    assert set(summary["timings"]) >= {"splits", "diagnostics", "artifacts"}


@pytest.mark.parametrize("setting, fragment", [
    ("selection.candidates=['bandwith']", "did you mean 'bandwidth'"),
    ("selection.candidates=[]", "is empty"),
    ("selection.objectives=['accuracy']", "unknown objective"),
    ("selection.trajectory=[0]", "fractions in (0, 1]"),
    ("selection.folds=40", "smallest class"),
    ("selection.rule='lowest'", "one of"),
])
def test_bad_selection_settings_get_one_line_and_nothing_is_written(setting, fragment,
                                                                      tmp_path, capsys):
    out = tmp_path / "run"
    code = main(["fit", "--qubits", "2", "--out", str(out), *TINY, "--set", setting])
    err = capsys.readouterr().err.strip()
    assert code == 2 and fragment in err and "Traceback" not in err
    assert len(err.splitlines()) == 1 and not out.exists()


def test_inner_folds_above_the_smallest_class_are_refused_by_the_library():
    split, blueprint, gram = small_problem(n=20)
    with pytest.raises(InvalidInputError, match="smallest class"):
        learn_and_select(blueprint, split.X_train, split.y_train, TrainingSettings(steps=2),
                         SelectionSettings(folds=12), seed=0, gram=gram)


def test_rescaled_candidates_multiply_the_untrained_bandwidth_and_come_before_training():
    blueprint = build_encoding("layered", 2, n_qubits=2, layers=1)
    chosen = SelectionSettings(scopes=("rescaled", "full"), bandwidth_factors=(4.0, 0.5),
                               objectives=("centered_alignment",),
                               trajectory=(1.0,))
    candidates = candidates_for(blueprint, TrainingSettings(steps=8), chosen)
    assert [c.name for c in candidates] == ["untrained", "rescaled x0.5", "rescaled x4",
                                            "full/centered_alignment@8"]
    split, blueprint, gram = small_problem()
    result = learn_and_select(blueprint, split.X_train, split.y_train,
                              TrainingSettings(steps=2), chosen._replace(folds=2), seed=0,
                              gram=gram)
    base = float(result.params["untrained"]["log_bandwidth"])
    assert float(result.params["rescaled x4"]["log_bandwidth"]) == pytest.approx(
        base + np.log(4.0), abs=1e-6)
    np.testing.assert_array_equal(result.params["rescaled x0.5"]["weights"],
                                  result.params["untrained"]["weights"])
    # a frozen bandwidth cannot be rescaled: no such candidates
    frozen = TrainingSettings(steps=8, freeze=("log_bandwidth",))
    assert all(c.scope != "rescaled" for c in candidates_for(blueprint, frozen, chosen))


def _learned_kept_by_best_or_untrained(best, untrained):
    return untrained["cv_accuracy_mean"] < best["cv_accuracy_mean"] - best["cv_accuracy_se"] - 1e-12


def _learned_kept_by_paired(best, untrained):
    return (best["cv_gain_over_untrained"] is not None
            and best["cv_gain_over_untrained"] > best["cv_gain_over_untrained_se"] + 1e-12)


@pytest.mark.parametrize("rule, rule_words, kept", [
    ("best_or_untrained", "two levels of complexity", _learned_kept_by_best_or_untrained),
    ("paired", "paired difference", _learned_kept_by_paired)])
def test_fit_keeps_the_best_or_nothing_learned_as_its_rule_says(tmp_path, rule, rule_words,
                                                                 kept):
    out = tmp_path / "run"
    assert main(["fit", "--qubits", "2", "--seed", "5", "--out", str(out), *TINY,
                 "--set", f"selection.rule='{rule}'"]) == 0
    sel = json.loads((out / "summary.json").read_text())["selection"]
    assert rule_words in sel["rule"]
    assert sel["chosen"] in ("untrained", sel["best"])
    by_name = {c["name"]: c for c in sel["candidates"]}
    assert (sel["chosen"] != "untrained") == kept(by_name[sel["best"]], by_name["untrained"])


def test_fit_on_reduced_features_also_compares_with_svms_on_every_input_column(tmp_path):
    out = tmp_path / "run"
    assert main(["fit", "--data", "breast_cancer", "--qubits", "2", "--seed", "1", "--out",
                 str(out), *TINY]) == 0
    summary = json.loads((out / "summary.json").read_text())
    assert summary["dataset"]["reduction"] == "pca"
    family = summary["significance"]["all_features"]
    assert set(family["comparisons"]) == {"quantum_vs_rbf_svm_all_features",
                                          "quantum_vs_linear_svm_all_features"}
    per_repeat = summary["significance"]["per_repeat"]
    assert len(per_repeat["rbf_svm_all_features"]) == len(per_repeat["quantum"]) == 2
    assert summary["baselines"]["rbf_svm_all_features"]["test_accuracy"] == \
        per_repeat["rbf_svm_all_features"][0]
    diffs = np.asarray(per_repeat["quantum"]) - np.asarray(per_repeat["rbf_svm_all_features"])
    assert family["comparisons"]["quantum_vs_rbf_svm_all_features"]["mean_difference"] == \
        pytest.approx(diffs.mean())
    assert "30 input features" in summary["headline"]["all_features"]["verdict"]


def test_majority_rate_is_the_share_of_the_most_common_training_class_in_the_test_rows():
    from hilbertune.pipeline import majority_rate

    # by hand: training majority is "b" (3 of 5); 2 of the 4 test rows are "b"
    assert majority_rate(["a", "b", "b", "a", "b"], ["b", "a", "b", "a"]) == 0.5
    # ties go to the first class in sorted order (numpy.unique order): 0
    assert majority_rate([1, 0, 0, 1], [0, 0, 0, 1]) == 0.75


def test_on_imbalanced_noise_the_report_warns_that_accuracy_says_little(tmp_path):
    # INVENTED: 3 pure-noise columns, 10% of the rows in class 1; every classifier is near
    # the 0.9 of always answering class 0, and the summary must say so
    rng = np.random.default_rng(0)
    rows = ["a,b,c,label"] + [f"{x:.5f},{u:.5f},{v:.5f},{int(i % 10 == 0)}"
                              for i, (x, u, v) in enumerate(rng.normal(size=(80, 3)))]
    path = tmp_path / "noise.csv"
    path.write_text("\n".join(rows) + "\n")
    out = tmp_path / "run"
    assert main(["fit", "--data", str(path), "--target", "label", "--qubits", "3", "--out",
                 str(out), *TINY]) == 0
    summary = json.loads((out / "summary.json").read_text())
    floor = summary["significance"]["per_repeat"]["majority_class"]
    # by hand: 8 of 80 rows are class 1; the stratified 30% test part (24 rows) holds 2 of
    # them, so always answering 0 is right on 22 of 24
    assert floor[0] == summary["baselines"]["majority_class"]["test_accuracy"] == \
        pytest.approx(22 / 24)
    assert any("most common class" in c for c in summary["cautions"])
    assert summary["headline"]["test_accuracy"]["majority_class"] == floor[0]
