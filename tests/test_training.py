"""Tests of the training loop: labels, determinism, checkpoints, guards, and that it learns."""

import json
import math
import os

import numpy as np
import pytest
import jax
import jax.numpy as jnp
import optax
from scipy.spatial.distance import pdist
from sklearn.model_selection import StratifiedKFold, cross_val_score
from sklearn.svm import SVC

from hilbertune import build_encoding, initial_params, quantum_gram
from hilbertune.kernels import gram_for_training
from hilbertune.errors import (ArtifactError, InvalidInputError, ResourceLimitError,
                               TrainingError)
from hilbertune.training import (TrainingSettings, balanced_batch_indices, encode_labels,
                                 median_heuristic_bandwidth, padded_size, quick_compile_options,
                                 stratified_split, train_encoding, training_gram,
                                 training_loss_function, tune_svm_c, _StaticConfig)

BLUEPRINT = build_encoding("layered", 2, n_qubits=2, layers=1)
BASE = TrainingSettings(steps=6, learning_rate=0.05, patience=0)


def blobs(n=40, seed=0):
    """Two noisy Gaussian blobs in 2-D (our own generator), labels 0/1."""
    rng = np.random.default_rng(seed)
    y = np.arange(n) % 2
    X = rng.normal(scale=0.6, size=(n, 2)) + np.where(y[:, None] == 1, 1.0, -1.0)
    return X, y


def checkerboard(n, seed):
    """2 x 2 checkerboard on [-1, 1]^2 (our own generator): a poor fit for a raw kernel."""
    rng = np.random.default_rng(seed)
    X = rng.uniform(-1.0, 1.0, size=(n, 2))
    y = ((np.floor(2 * X[:, 0]) + np.floor(2 * X[:, 1])) % 2).astype(int)
    return X, y


def without_wall_time(history):
    return [{k: v for k, v in entry.items() if k != "wall_time"} for entry in history]


def same_params(a, b):
    return a.keys() == b.keys() and all(
        np.asarray(a[k]).tobytes() == np.asarray(b[k]).tobytes() for k in a)


# ----------------------------------------------------------------------------- labels / input

def test_string_labels_are_mapped_with_unique():
    X, y = blobs()
    names = np.where(y == 1, "dog", "cat")
    result = train_encoding(BLUEPRINT, X, names, BASE._replace(steps=1), seed=0)
    assert result.classes.tolist() == ["cat", "dog"]
    reference = train_encoding(BLUEPRINT, X, y, BASE._replace(steps=1), seed=0)
    assert same_params(result.params, reference.params)  # same problem, only renamed


def test_encode_labels_matches_numpy_unique():
    y = np.array(["b", "a", "c", "a"])
    classes, y_int = encode_labels(y)
    ref_classes, ref_inverse = np.unique(y, return_inverse=True)
    assert classes.tolist() == ref_classes.tolist()
    np.testing.assert_array_equal(y_int, ref_inverse)


@pytest.mark.parametrize("labels, message", [
    (np.array([0.0, 1.0, np.nan, 1.0] * 10), "NaN"),
    (np.zeros(40), "only one class"),
    (np.arange(39) % 2, "labels"),
])
def test_bad_labels_are_refused(labels, message):
    X, _ = blobs()
    with pytest.raises(InvalidInputError, match=message):
        train_encoding(BLUEPRINT, X, labels, BASE, seed=0)


@pytest.mark.parametrize("change, message", [
    ({"optimizer": "adan"}, "did you mean 'adam'"),
    ({"objective": "centred_alignment"}, "did you mean 'centered_alignment'"),
    ({"schedule": "cosin"}, "did you mean 'cosine'"),
    ({"freeze": ("weight",)}, "freeze"),
    ({"learning_rate": -1.0}, "learning_rate"),
    ({"folds": 1}, "folds"),
    ({"validation_fraction": 1.0}, "validation_fraction"),
])
def test_bad_settings_are_refused_with_a_fix(change, message):
    X, y = blobs()
    with pytest.raises(InvalidInputError, match=message):
        train_encoding(BLUEPRINT, X, y, BASE._replace(**change), seed=0)


def test_fewer_samples_than_folds_is_refused():
    X, y = blobs(n=8)
    settings = BASE._replace(objective="ridge_kfold", folds=10, validation_fraction=0.0)
    with pytest.raises(InvalidInputError, match="folds"):
        train_encoding(BLUEPRINT, X, y, settings, seed=0)


def test_step_that_would_not_fit_in_memory_is_refused():
    X, y = blobs()
    with pytest.raises(ResourceLimitError, match="batch_size"):
        train_encoding(BLUEPRINT, X, y, BASE, seed=0, memory_budget="20kB")


def test_validation_split_needs_two_samples_per_class():
    X, _ = blobs(n=5)
    y = np.array([0, 0, 0, 0, 1])
    with pytest.raises(InvalidInputError, match="validation_fraction=0"):
        train_encoding(BLUEPRINT, X, y, BASE._replace(validation_fraction=0.2), seed=0)


# ----------------------------------------------------------------------------- pieces

def test_stratified_split_is_disjoint_complete_and_proportional():
    y = np.array([0] * 20 + [1] * 10 + [2] * 5)
    train, val = stratified_split(y, 0.2, np.random.default_rng(0))
    assert set(train).isdisjoint(val) and sorted(np.concatenate([train, val])) == list(range(35))
    assert np.bincount(y[val]).tolist() == [4, 2, 1]  # round(0.2 * n_c), at least 1
    assert np.all(np.diff(y[train]) >= 0)  # ordered by class


def test_median_heuristic_matches_scipy_pdist():
    # rule: c * median pairwise distance = sqrt(2); scipy.spatial.distance.pdist as reference
    X = np.random.default_rng(3).normal(size=(50, 4))
    c = median_heuristic_bandwidth(X, np.random.default_rng(0))
    np.testing.assert_allclose(c * np.median(pdist(X)), math.sqrt(2.0), rtol=1e-10)


def test_balanced_batch_takes_distinct_members_per_class():
    members = (jnp.asarray([0, 2, 4, 6, 0, 0], jnp.int32), jnp.asarray([1, 3, 5, 0], jnp.int32))
    sizes = jnp.asarray([4, 3], jnp.int32)  # entries beyond the size are padding
    select = jax.jit(balanced_batch_indices, static_argnums=3,
                     compiler_options=quick_compile_options())
    for t in range(5):
        index = np.asarray(select(jax.random.key(t), members, sizes, (3, 2)))
        assert len(index) == 5 and len(set(index.tolist())) == 5
        assert set(index[:3]) <= {0, 2, 4, 6} and set(index[3:]) <= {1, 3, 5}
    again = select(jax.random.key(4), members, sizes, (3, 2))
    np.testing.assert_array_equal(np.asarray(again), index)


def test_padded_size_bounds():
    for n in (1, 31, 32, 33, 100, 129, 1000, 3000):
        padded = padded_size(n)
        assert padded >= n and padded % 32 == 0
        assert n < 128 or padded - n < 0.25 * n
    assert padded_size(5000) == 5000


def test_tune_svm_c_agrees_with_cross_val_score():
    # scikit-learn reference: cross_val_score of SVC(precomputed) with the same folds
    X, y = blobs(n=30, seed=5)
    K = np.exp(-((X[:, None] - X[None]) ** 2).sum(-1))
    choice = tune_svm_c(K, y, c_grid=(0.01, 1.0, 100.0), cv=3, seed=2)
    folds = StratifiedKFold(3, shuffle=True, random_state=2)
    reference = cross_val_score(SVC(kernel="precomputed", C=choice.C), K, y, cv=folds).mean()
    np.testing.assert_allclose(choice.cv_accuracy, reference)
    assert choice.C in (0.01, 1.0, 100.0) and choice.cv_accuracy == max(choice.scores.values())


def test_training_loss_gradient_matches_finite_differences():
    # end to end (circuit -> Gram -> centered alignment) in float32: loose tolerance;
    # central differences (f(p + e v) - f(p - e v)) / 2e along a random direction
    X, y = blobs(n=24, seed=6)
    config = _StaticConfig("centered_alignment", 2, 0.1, 5, 5, 0.0,
                           ("weights", "biases", "log_bandwidth"), "adam", 0.05, "constant", 0,
                           1.0, 0.0, None, False, True)
    loss = training_loss_function(BLUEPRINT, config)
    params = initial_params(BLUEPRINT, jax.random.key(0), bias_scale=0.3)
    Xj, yj = jnp.asarray(X, jnp.float32), jnp.asarray(y)
    options = quick_compile_options()
    gradient = jax.jit(jax.grad(lambda p: loss(p, {}, p, Xj, yj)[0]),
                       compiler_options=options)(params)
    value = jax.jit(lambda p: loss(p, {}, p, Xj, yj)[0], compiler_options=options)
    rng = np.random.default_rng(0)
    direction = {k: jnp.asarray(rng.normal(size=np.shape(v)), jnp.float32)
                 for k, v in params.items()}
    eps = 1e-2
    shifted = lambda s: {k: params[k] + s * eps * direction[k] for k in params}
    numeric = (float(value(shifted(1.0))) - float(value(shifted(-1.0)))) / (2 * eps)
    analytic = sum(float(jnp.sum(gradient[k] * direction[k])) for k in params)
    np.testing.assert_allclose(analytic, numeric, rtol=3e-2, atol=1e-3)


def test_symmetric_gram_derivative_equals_plain_autodiff():
    # reference: JAX autodiff through kernels.gram_for_training (|S S^H|^2 operand by operand)
    blueprint = build_encoding("layered", 3, n_qubits=3, layers=2)
    params = initial_params(blueprint, jax.random.key(1), bias_scale=0.3)
    X = jnp.asarray(np.random.default_rng(1).uniform(-1, 1, size=(20, 3)), jnp.float32)
    W = jnp.asarray(np.random.default_rng(2).normal(size=(20, 20)), jnp.float32)  # not symmetric
    options = quick_compile_options()
    ours = jax.jit(jax.value_and_grad(lambda p: jnp.sum(W * training_gram(blueprint, p, X))),
                   compiler_options=options)(params)
    plain = jax.jit(jax.value_and_grad(lambda p: jnp.sum(W * gram_for_training(blueprint, p, X))),
                    compiler_options=options)(params)
    np.testing.assert_allclose(float(ours[0]), float(plain[0]), rtol=1e-5)
    for name in params:
        np.testing.assert_allclose(np.asarray(ours[1][name]), np.asarray(plain[1][name]),
                                   rtol=1e-4, atol=1e-4)


def test_planar_matmul_matches_numpy_complex_product():
    # Gauss's three-multiplication form of a complex product (Knuth, TAOCP vol. 2, 4.6.4)
    # against numpy's complex matmul as the reference
    from hilbertune.training import planar_matmul

    rng = np.random.default_rng(7)
    W = rng.normal(size=(30, 30)) + 1j * rng.normal(size=(30, 30))
    A, B = rng.normal(size=(30, 20)), rng.normal(size=(30, 20))
    real, imag = planar_matmul(jnp.asarray(W, jnp.complex64), jnp.asarray(A, jnp.float32),
                               jnp.asarray(B, jnp.float32))
    reference = W @ (A + 1j * B)
    np.testing.assert_allclose(np.asarray(real), reference.real, atol=1e-4)
    np.testing.assert_allclose(np.asarray(imag), reference.imag, atol=1e-4)


def test_host_blas_gram_path_matches_xla_and_is_repeatable():
    # the large-problem path (BLAS herk forward via pure_callback, backward as three real
    # products) against the in-graph path and plain autodiff of |S S^H|^2
    from hilbertune.training import _fidelity_in_xla, _fidelity_on_host

    rng = np.random.default_rng(4)
    states = rng.normal(size=(40, 16)) + 1j * rng.normal(size=(40, 16))
    states = jnp.asarray(states / np.linalg.norm(states, axis=1, keepdims=True), jnp.complex64)
    W = jnp.asarray(rng.normal(size=(40, 40)), jnp.float32)
    parts = (jnp.real(states), jnp.imag(states))

    def plain(real, imag):
        overlap = jax.lax.complex(real, imag) @ jnp.conj(jax.lax.complex(real, imag)).T
        return jnp.real(overlap) ** 2 + jnp.imag(overlap) ** 2

    results = {}

    def complex_input(fidelity):
        return lambda real, imag: fidelity(jax.lax.complex(real, imag))

    for name, fn in (("host", complex_input(_fidelity_on_host)),
                     ("xla", complex_input(_fidelity_in_xla)), ("plain", plain)):
        value_and_grad = jax.jit(jax.value_and_grad(lambda r, i: jnp.sum(W * fn(r, i)),
                                                    argnums=(0, 1)))
        results[name] = value_and_grad(*parts)
        if name == "host":
            again = value_and_grad(*parts)
            assert all(np.asarray(a).tobytes() == np.asarray(b).tobytes()
                       for a, b in zip(jax.tree_util.tree_leaves(again),
                                       jax.tree_util.tree_leaves(results[name])))
    for name in ("host", "xla"):
        np.testing.assert_allclose(float(results[name][0]), float(results["plain"][0]),
                                   rtol=1e-5)
        for ours, reference in zip(results[name][1], results["plain"][1]):
            np.testing.assert_allclose(np.asarray(ours), np.asarray(reference), atol=1e-4)


# ----------------------------------------------------------------------------- loop behaviour

def test_history_records_every_step_and_the_schedule():
    X, y = blobs()
    settings = BASE._replace(schedule="cosine", validation_fraction=0.25)
    result = train_encoding(BLUEPRINT, X, y, settings, seed=1)
    history = result.history
    assert [h["step"] for h in history] == list(range(settings.steps + 1))
    assert result.stop_reason == "completed 6 steps"
    schedule = optax.cosine_decay_schedule(settings.learning_rate, settings.steps)  # reference
    for entry in history[:-1]:
        np.testing.assert_allclose(entry["learning_rate"], float(schedule(entry["step"])),
                                   rtol=1e-6)
    assert all(entry["validation_objective"] is not None for entry in history)
    assert all(-1.0 <= entry["alignment"] <= 1.0 for entry in history)
    for entry in history:  # the minimized objective is the negated centered alignment
        np.testing.assert_allclose(entry["objective"], -entry["centered_alignment"], rtol=1e-5)
    times = [entry["wall_time"] for entry in history]
    assert times == sorted(times)
    best = min(history, key=lambda h: h["validation_objective"])
    assert result.best_step == best["step"]


def test_same_seed_gives_identical_params_and_history():
    X, y = blobs(n=48)
    settings = BASE._replace(batch_size=16, validation_fraction=0.25, bias_scale=0.1)
    first = train_encoding(BLUEPRINT, X, y, settings, seed=7)
    second = train_encoding(BLUEPRINT, X, y, settings, seed=7)
    assert same_params(first.params, second.params)
    assert same_params(first.initial_params, second.initial_params)
    assert json.dumps(without_wall_time(first.history)) == \
        json.dumps(without_wall_time(second.history))
    other = train_encoding(BLUEPRINT, X, y, settings, seed=8)
    assert not same_params(first.params, other.params)  # the seed matters


def test_resume_from_checkpoint_equals_uninterrupted_run(tmp_path):
    X, y = blobs(n=48)
    settings = BASE._replace(steps=7, batch_size=16, validation_fraction=0.25,
                             checkpoint_every=2)
    straight = train_encoding(BLUEPRINT, X, y, settings, seed=3,
                              checkpoint_dir=str(tmp_path / "a"))
    paused = train_encoding(BLUEPRINT, X, y, settings, seed=3,
                            checkpoint_dir=str(tmp_path / "b"), pause_after=3)
    assert paused.stop_reason.startswith("paused before step 3")
    summary = json.loads((tmp_path / "b" / "checkpoint.json").read_text())
    assert summary["step"] == 3
    with np.load(tmp_path / "b" / "checkpoint.npz", allow_pickle=False) as stored:
        assert "params/weights" in stored.files and "batch_key_data" in stored.files
    resumed = train_encoding(BLUEPRINT, X, y, settings, seed=3,
                             checkpoint_dir=str(tmp_path / "b"))
    assert same_params(resumed.params, straight.params)
    assert without_wall_time(resumed.history) == without_wall_time(straight.history)
    assert (resumed.best_step, resumed.stop_reason) == (straight.best_step,
                                                        straight.stop_reason)
    # a finished checkpoint returns the stored result without training again
    again = train_encoding(BLUEPRINT, X, y, settings, seed=3,
                           checkpoint_dir=str(tmp_path / "a"))
    assert same_params(again.params, straight.params)
    assert [h["wall_time"] for h in again.history] == [h["wall_time"] for h in
                                                       straight.history]
    assert not [name for name in os.listdir(tmp_path / "a") if name.startswith(".tmp")]


def test_checkpoint_of_other_settings_is_refused(tmp_path):
    X, y = blobs()
    train_encoding(BLUEPRINT, X, y, BASE, seed=0, checkpoint_dir=str(tmp_path))
    with pytest.raises(ArtifactError, match="resume=False"):
        train_encoding(BLUEPRINT, X, y, BASE._replace(learning_rate=0.01), seed=0,
                       checkpoint_dir=str(tmp_path))
    fresh = train_encoding(BLUEPRINT, X, y, BASE._replace(learning_rate=0.01), seed=0,
                           checkpoint_dir=str(tmp_path), resume=False)
    assert fresh.stop_reason == "completed 6 steps"


def test_frozen_parameters_stay_put():
    X, y = blobs()
    result = train_encoding(BLUEPRINT, X, y, BASE._replace(freeze=("log_bandwidth", "biases")),
                            seed=0)
    assert result.params["log_bandwidth"] == result.initial_params["log_bandwidth"]
    np.testing.assert_array_equal(result.params["biases"], result.initial_params["biases"])
    assert not np.array_equal(result.params["weights"], result.initial_params["weights"])


def test_encoding_without_trainable_parameters_is_only_evaluated():
    X, y = blobs()
    amplitude = build_encoding("amplitude", 2)
    result = train_encoding(amplitude, np.abs(X) + 0.1, y, BASE, seed=0)
    assert result.stop_reason.startswith("nothing to train")
    assert len(result.history) == 1 and result.history[0]["grad_norm"] == 0.0


def test_early_stop_keeps_the_best_parameters():
    X, y = blobs()
    # an improvement must exceed 10 (impossible), so step 0 stays best and patience ends it
    settings = BASE._replace(patience=1, min_improvement=10.0, validation_fraction=0.25)
    result = train_encoding(BLUEPRINT, X, y, settings, seed=0)
    assert result.stop_reason.startswith("early stop")
    assert result.best_step == 0 and len(result.history) == 2
    assert same_params(result.params, result.initial_params)


def test_l2_penalty_keeps_parameters_near_their_start():
    X, y = blobs()

    def drift(strength):
        r = train_encoding(BLUEPRINT, X, y, BASE._replace(l2_penalty=strength, steps=10),
                           seed=0)
        return sum(float(np.sum((r.params[k] - r.initial_params[k]) ** 2)) for k in r.params)

    assert drift(100.0) < 0.5 * drift(0.0)


def test_non_finite_objective_stops_and_keeps_last_good_params():
    X, y = blobs()
    # plain SGD with an absurd rate and no clipping throws log_bandwidth far away: the
    # bandwidth exp(log c) overflows and the angles become non-finite
    settings = BASE._replace(optimizer="sgd", learning_rate=1e9, clip_norm=0.0,
                             freeze=("weights", "biases"))
    result = train_encoding(BLUEPRINT, X, y, settings, seed=0)
    assert "non-finite" in result.stop_reason
    assert all(np.all(np.isfinite(v)) for v in result.params.values())
    assert result.best_step == result.history[-1]["step"]


def test_non_finite_start_raises_training_error():
    X, y = blobs()
    params = {**initial_params(BLUEPRINT), "log_bandwidth": np.float32(200.0)}  # c = inf
    with pytest.raises(TrainingError, match="initial parameters"):
        train_encoding(BLUEPRINT, X, y, BASE, seed=0, params=params)


def test_progress_bar_can_be_shown(capsys):
    X, y = blobs()
    result = train_encoding(BLUEPRINT, X, y, BASE._replace(steps=2), seed=0, progress=True)
    assert result.stop_reason == "completed 2 steps"


# ----------------------------------------------------------------------------- it learns

def test_training_raises_alignment_and_test_accuracy_on_a_checkerboard():
    # the raw layered kernel at a small bandwidth cannot see a 2 x 2 checkerboard (chance
    # accuracy); training the weights, biases and bandwidth must fix that by a clear margin
    blueprint = build_encoding("layered", 2, n_qubits=2, layers=2)
    X_train, y_train = checkerboard(160, 0)
    X_test, y_test = checkerboard(200, 100)
    settings = TrainingSettings(steps=80, learning_rate=0.1, bandwidth=0.3,
                                validation_fraction=0.0)
    result = train_encoding(blueprint, X_train, y_train, settings, seed=0)

    def accuracy(params):
        K = np.asarray(quantum_gram(blueprint, params, X_train), dtype=float)
        K_test = np.asarray(quantum_gram(blueprint, params, X_test, X_train), dtype=float)
        return SVC(kernel="precomputed", C=10.0).fit(K, y_train).score(K_test, y_test)

    before, after = accuracy(result.initial_params), accuracy(result.params)
    first, last = result.history[0], result.history[-1]
    assert last["centered_alignment"] > first["centered_alignment"] + 0.1
    assert before < 0.6 and after > before + 0.15, (before, after)


def test_default_batch_is_full_up_to_512_rows_and_class_balanced_beyond():
    from hilbertune.training import _batch_counts

    default = TrainingSettings().batch_size
    assert _batch_counts(np.arange(400) % 2, 2, default) is None  # full batch
    # 1200 rows, classes 900 / 300: 256 of each per step (class-balanced, 512 in all)
    y = np.r_[np.zeros(900, int), np.ones(300, int)]
    assert _batch_counts(y, 2, default) == (256, 256)
    # a class smaller than its share gives all its rows
    y = np.r_[np.zeros(1100, int), np.ones(100, int)]
    assert _batch_counts(y, 2, default) == (256, 100)
