"""Property-based tests (hypothesis): random configs, files and data either work or raise
our own error type; kernels built on random circuits stay valid Gram matrices.

Two kinds of property:
- robustness: every public entry point that takes user input, fed arbitrary values,
  returns normally or raises ``HilbertuneError`` (never a bare ``KeyError``,
  ``TypeError``, ``IndexError``, ...). A traceback from one of those is what a user
  would see from the command line.
- kernel validity: a fidelity kernel is ``|<psi(x)|psi(x')>|^2`` with normalized states,
  so its Gram is symmetric, has unit diagonal and lies in [0, 1] (Cauchy-Schwarz; common
  practice, e.g. Schuld & Killoran, PRL 122, 040504 (2019), from memory). The projected
  kernel ``exp(-gamma * d^2)`` of Huang et al., Nat. Commun. 12, 2631 (2021) has the same
  three properties (d = 0 on the diagonal, d^2 >= 0).

Example counts are small (the module takes about a minute on a busy 2-core machine); the
database of failing examples hypothesis keeps makes a found failure reproduce next time.
"""

from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings, strategies as st

from hilbertune import config as cfg
from hilbertune import data
from hilbertune.circuits import AngleRule, Blueprint, Step, initial_params
from hilbertune.encodings import build_encoding
from hilbertune.errors import HilbertuneError, InvalidInputError
from hilbertune.kernels import projected_gram, quantum_gram, resolve_memory_budget

FAST = settings(max_examples=25, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
QUICK = settings(max_examples=60, deadline=None,
                 suppress_health_check=[HealthCheck.too_slow,
                                        HealthCheck.function_scoped_fixture])

# complex64 states: |<a|b>|^2 is exact to a few float32 ulps per gate (common practice)
ATOL = 5e-5

# --------------------------------------------------------------------------- value soup

scalars = st.one_of(
    st.none(), st.booleans(), st.integers(-10**12, 10**12),
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=12),
    st.sampled_from(["pca", "first", "iqp", "layered", "angle", "adam", "ring", "cz", "y",
                     "fidelity", "projected", "ridge_loo", "4GiB", "demo", "csv"]))
values = st.one_of(scalars, st.lists(scalars, max_size=4),
                   st.dictionaries(st.text(max_size=6), scalars, max_size=3))
keys = st.one_of(st.sampled_from(cfg.all_keys()), st.text(max_size=20),
                 st.sampled_from(["data", "training", "seed.x", "training.steps.x", ""]))


@QUICK
@given(overrides=st.lists(st.tuples(keys, values), max_size=5))
def test_resolve_config_returns_a_round_tripping_config_or_our_error(overrides):
    try:
        config = cfg.resolve_config(overrides=overrides)
    except InvalidInputError as exc:
        assert str(exc) and "\n" not in str(exc)
        return
    # what is written as config.toml must read back (Python's tomllib) to the same config
    assert tomllib.loads(cfg.dump_toml(config)) == config


@QUICK
@given(user=st.dictionaries(st.text(max_size=12), values, max_size=4),
       nested=st.dictionaries(st.sampled_from(["data", "training", "encoding", "svm"]),
                              st.dictionaries(st.text(max_size=14), values, max_size=3),
                              max_size=2))
def test_resolve_config_accepts_any_toml_like_dict_or_refuses(user, nested):
    try:
        cfg.resolve_config({**user, **nested})
    except InvalidInputError:
        pass


@QUICK
@given(text=st.text(max_size=40))
def test_parse_assignment_never_raises_anything_else(text):
    try:
        key, _ = cfg.parse_assignment(text)
    except InvalidInputError:
        assert "=" not in text
        return
    assert key == text.split("=", 1)[0].strip()


@QUICK
@given(budget=st.one_of(st.text(max_size=12), st.integers(-5, 10**15),
                        st.floats(allow_nan=True, allow_infinity=True)))
def test_memory_budget_is_positive_or_refused(budget):
    try:
        value = resolve_memory_budget(budget)
    except InvalidInputError:
        return
    assert isinstance(value, int) and value > 0


@QUICK
@given(text=st.text(max_size=200))
def test_toml_loader_never_raises_anything_else(tmp_path, text):
    path = tmp_path / "c.toml"
    path.write_text(text, encoding="utf-8")
    try:
        cfg.resolve_config(cfg.load_toml(path))
    except InvalidInputError:
        pass


# --------------------------------------------------------------------------- CSV files

cells = st.one_of(st.floats(allow_nan=True, allow_infinity=True).map(repr),
                  st.integers(-5, 5).map(str), st.sampled_from(["", "na", "?", "x", "1e3", " 2 ",
                                                                "inf", "-0", "a,b", '"q"']),
                  st.text(alphabet=",;\t\"\n ab01.", max_size=4))


@st.composite
def csv_texts(draw):
    n_cols = draw(st.integers(1, 4))
    header = draw(st.lists(st.sampled_from(["a", "b", "kind", "", "a ", "1", "x;y"]),
                           min_size=n_cols, max_size=n_cols))
    rows = draw(st.lists(st.lists(cells, min_size=max(0, n_cols - 1), max_size=n_cols + 1),
                         max_size=8))
    sep = draw(st.sampled_from([",", ";", "\t"]))
    lines = [sep.join(header)] + [sep.join(r) for r in rows]
    return "\n".join(lines) + draw(st.sampled_from(["", "\n", "\r\n"]))


@QUICK
@given(text=csv_texts(), target=st.sampled_from(["kind", "a", "b", "nope"]),
       drop=st.booleans())
def test_load_csv_returns_a_clean_dataset_or_our_error(tmp_path, text, target, drop):
    path = tmp_path / "d.csv"
    path.write_text(text, encoding="utf-8")
    try:
        dataset = data.load_csv(path, target, drop_missing=drop)
    except InvalidInputError as exc:
        assert "\n" not in str(exc)
        return
    assert dataset.X.dtype == np.float64 and np.isfinite(dataset.X).all()
    assert dataset.X.shape == (len(dataset.y), len(dataset.feature_names))
    assert np.unique(dataset.y).size >= 2


@QUICK
@given(raw=st.binary(max_size=120))
def test_load_csv_on_arbitrary_bytes(tmp_path, raw):
    path = tmp_path / "d.csv"
    path.write_bytes(raw)
    for call in (lambda: data.load_csv(path, "kind"),
                 lambda: data.load_features(path, ("a", "b"))):
        try:
            call()
        except InvalidInputError:
            pass


@QUICK
@given(text=csv_texts())
def test_load_features_returns_finite_columns_or_our_error(tmp_path, text):
    path = tmp_path / "d.csv"
    path.write_text(text, encoding="utf-8")
    try:
        X = data.load_features(path, ("a", "b"))
    except InvalidInputError:
        return
    assert X.shape[1] == 2 and np.isfinite(X).all()


# --------------------------------------------------------------------------- split + scale

@FAST
@given(n=st.integers(1, 14), f=st.integers(1, 4), classes=st.integers(1, 3),
       test_fraction=st.floats(0.0, 1.0), components=st.one_of(st.none(), st.integers(0, 5)),
       reduce=st.sampled_from(["pca", "first", "other"]), seed=st.integers(0, 3),
       scale=st.sampled_from([1e-300, 1.0, 1e300]), data_seed=st.integers(0, 2**16))
def test_split_and_scale_maps_train_rows_into_the_angle_range_or_refuses(
        n, f, classes, test_fraction, components, reduce, seed, scale, data_seed):
    rng = np.random.default_rng(data_seed)
    X = rng.normal(size=(n, f)) * scale
    y = rng.integers(0, classes, n)
    try:
        split = data.split_and_scale(X, y, test_fraction=test_fraction, seed=seed,
                                     n_components=components, reduce=reduce)
    except InvalidInputError:
        return
    low, high = data.ANGLE_RANGE
    for part in (split.X_train, split.X_test):
        assert np.isfinite(part).all()
        assert part.min() >= low - 1e-9 and part.max() <= high + 1e-9
    assert len(split.y_train) + len(split.y_test) == n


@QUICK
@given(shapes=st.lists(st.integers(0, 3), min_size=4, max_size=4), reduce=st.text(max_size=4),
       clip=st.one_of(st.booleans(), st.integers(0, 2)))
def test_preprocessing_from_arrays_accepts_consistent_arrays_only(shapes, reduce, clip):
    f, d, a, b = shapes
    arrays = {"reduce": np.asarray(reduce), "center": np.zeros(f), "scale": np.ones(f),
              "projection": np.ones((f, d)), "minmax_scale": np.ones(a),
              "minmax_offset": np.zeros(b), "feature_range": np.array([0.0, 1.0]),
              "clip": np.asarray(clip)}
    try:
        prep = data.Preprocessing.from_arrays(arrays)
    except InvalidInputError:
        assert not (a == b == d)
        return
    assert prep.n_input_features == f and prep.n_output_features == d


# --------------------------------------------------------------------------- encodings

family_options = {
    "angle": st.fixed_dictionaries({"axis": st.sampled_from(["x", "y", "z", "w"])}),
    "iqp": st.fixed_dictionaries({"layers": st.integers(0, 2),
                                  "pairs": st.sampled_from(["all", "linear", "ring", "none",
                                                            "rign"])}),
    "layered": st.fixed_dictionaries({
        "n_qubits": st.one_of(st.none(), st.integers(0, 4)), "layers": st.integers(0, 2),
        "entangler": st.sampled_from(["none", "linear", "ring", "all"]),
        "entangler_gate": st.sampled_from(["cz", "cnot", "swap"]),
        "axes": st.lists(st.sampled_from(["x", "y", "z", "q"]), max_size=3)}),
    "amplitude": st.fixed_dictionaries({"copies": st.integers(0, 2)}),
    "basis": st.just({}),
    "unknown": st.just({}),
}


@st.composite
def encodings(draw, max_qubits=4):
    family = draw(st.sampled_from(sorted(family_options)))
    n_features = draw(st.integers(0, 4))
    options = draw(family_options[family])
    return family, n_features, options


@QUICK
@given(spec=encodings(), extra=st.dictionaries(st.sampled_from(["depth", "layers", "copies"]),
                                               st.integers(-1, 3), max_size=1))
def test_build_encoding_returns_a_blueprint_or_our_error(spec, extra):
    family, n_features, options = spec
    try:
        bp = build_encoding(family, n_features, **{**options, **extra})
    except InvalidInputError as exc:
        assert str(exc)
        return
    assert isinstance(bp, Blueprint) and bp.n_features == n_features and bp.n_qubits >= 1


def _features_for(bp, rng, n: int) -> np.ndarray:
    if bp.binary_features:
        return rng.integers(0, 2, size=(n, bp.n_features)).astype(float)
    X = rng.uniform(-math.pi, math.pi, size=(n, bp.n_features))
    if bp.state_kind == "amplitude":
        X[:, 0] += 4.0  # no all-zero rows (amplitude encoding refuses them)
    return X


def _check_gram(K, n):
    K = np.asarray(K, dtype=np.float64)
    assert K.shape == (n, n)
    assert np.isfinite(K).all()
    np.testing.assert_allclose(K, K.T, atol=ATOL)
    np.testing.assert_allclose(np.diag(K), 1.0, atol=ATOL)
    assert K.min() >= -ATOL and K.max() <= 1.0 + ATOL


# Each new circuit compiles once per input shape, so the kernel properties use a fixed
# sample count and few examples.
KERNELS = settings(max_examples=15, deadline=None,
                   suppress_health_check=[HealthCheck.too_slow])
N_ROWS = 4


@KERNELS
@given(spec=encodings(), seed=st.integers(0, 2**16), log_c=st.floats(-3.0, 2.0),
       bias_scale=st.floats(0.0, 2.0))
def test_family_kernels_are_symmetric_unit_diagonal_in_unit_interval(spec, seed, log_c,
                                                                      bias_scale):
    import jax

    family, n_features, options = spec
    try:
        bp = build_encoding(family, n_features, **options)
    except InvalidInputError:
        return
    assume(bp.n_qubits <= 6)
    rng = np.random.default_rng(seed)
    params = initial_params(bp, jax.random.key(seed), bandwidth=math.exp(log_c),
                            bias_scale=bias_scale)
    X = _features_for(bp, rng, N_ROWS)
    K = np.asarray(quantum_gram(bp, params, X))
    _check_gram(K, N_ROWS)
    # a test-vs-train block (here: the same rows) agrees with the symmetric Gram
    np.testing.assert_allclose(np.asarray(quantum_gram(bp, params, X, X)), K, atol=ATOL)
    _check_gram(projected_gram(bp, params, X, gamma=0.7), N_ROWS)


@st.composite
def random_blueprints(draw, max_qubits=4, max_steps=12):
    """Hand-made circuits with every gate kind and every angle source."""
    n = draw(st.integers(1, max_qubits))
    f = draw(st.integers(1, 3))
    slots = draw(st.integers(1, 3))
    gates = ["rx", "ry", "rz", "h", "x"] + (["cnot", "cz", "zz"] if n > 1 else [])
    steps = []
    for _ in range(draw(st.integers(0, max_steps))):
        gate = draw(st.sampled_from(gates))
        if gate in ("cnot", "cz", "zz"):
            a, b = draw(st.lists(st.integers(0, n - 1), min_size=2, max_size=2, unique=True))
            qubits = (a, b)
        else:
            qubits = (draw(st.integers(0, n - 1)),)
        angle = None
        if gate in ("rx", "ry", "rz", "zz"):
            source = draw(st.sampled_from(["constant", "feature", "pair", "free"]))
            feats = {"feature": 1, "pair": 2}.get(source, 0)
            angle = AngleRule(source, tuple(draw(st.integers(0, f - 1)) for _ in range(feats)),
                              -1 if source == "constant" else draw(st.integers(0, slots - 1)),
                              draw(st.floats(-4.0, 4.0)))
        steps.append(Step(gate, qubits, angle))
    return Blueprint(n, f, tuple(steps), (1.0,) * slots)


@KERNELS
@given(bp=random_blueprints(), seed=st.integers(0, 2**16))
def test_random_circuit_kernels_are_valid_gram_matrices(bp, seed):
    n = N_ROWS
    rng = np.random.default_rng(seed)
    params = {"weights": rng.normal(size=bp.n_slots).astype(np.float32),
              "biases": rng.normal(size=bp.n_slots).astype(np.float32),
              "log_bandwidth": np.float32(rng.uniform(-1.0, 1.0))}
    X = rng.uniform(-3.0, 3.0, size=(n, bp.n_features))
    _check_gram(quantum_gram(bp, params, X), n)
    _check_gram(projected_gram(bp, params, X, gamma=1.3), n)


# ordinary values, non-finite ones, and finite float64 values beyond float32 (~3.4e38, the
# precision of the states)
features = st.one_of(st.floats(-1e6, 1e6), st.sampled_from([math.nan, math.inf, -math.inf]),
                     st.floats(1e38, 1e300))


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(bp=random_blueprints(max_qubits=2, max_steps=2),
       X=st.one_of(st.lists(st.lists(features, min_size=0, max_size=3), max_size=2),
                   st.just([]), st.text(max_size=3), st.integers(),
                   st.just([[1.0, 2.0], [3.0]])),
       budget=st.one_of(st.none(), st.sampled_from(["1B", "1KiB", "x"])))
def test_quantum_gram_on_bad_features_raises_our_error(bp, X, budget):
    params = initial_params(bp)
    try:
        K = quantum_gram(bp, params, X, memory_budget=budget)
    except HilbertuneError:
        return
    assert np.isfinite(np.asarray(K)).all()


def test_features_beyond_float32_range_are_refused():
    bp = build_encoding("angle", 2)
    params = initial_params(bp)
    X = np.array([[0.0, 0.0], [1e39, 0.0]])  # finite in float64, inf in float32
    with pytest.raises(InvalidInputError):
        quantum_gram(bp, params, X)


# --------------------------------------------------------------------------- training

@st.composite
def training_settings(draw):
    from hilbertune.training import TrainingSettings

    weird = st.one_of(st.integers(-2, 3), st.floats(allow_nan=True, allow_infinity=True),
                      st.text(max_size=3), st.none(), st.booleans())
    fields = {
        "objective": st.sampled_from(["alignment", "centered_alignment", "ridge_loo",
                                      "ridge_kfold", "alignmnet"]),
        "steps": st.one_of(st.integers(0, 2), weird),
        "learning_rate": st.one_of(st.floats(1e-3, 0.5), weird),
        "optimizer": st.sampled_from(["adam", "sgd", "rmsprop", "adamw", "lbfgs"]),
        "schedule": st.sampled_from(["constant", "cosine", "warmup_cosine", "step"]),
        "clip_norm": st.one_of(st.floats(0.0, 2.0), weird),
        "batch_size": st.one_of(st.integers(0, 8), weird),
        "validation_fraction": st.one_of(st.floats(0.0, 0.5), weird),
        "patience": st.one_of(st.integers(0, 3), weird),
        "ridge_lambda": st.one_of(st.floats(1e-3, 1.0), weird),
        "folds": st.one_of(st.integers(1, 4), weird),
        "freeze": st.one_of(st.lists(st.sampled_from(["weights", "biases", "log_bandwidth",
                                                      "w"]), max_size=2).map(tuple),
                            st.text(max_size=3)),
        "bandwidth": st.one_of(st.none(), st.floats(1e-3, 10.0), weird),
    }
    chosen = draw(st.lists(st.sampled_from(sorted(fields)), unique=True, max_size=4))
    return TrainingSettings(**{name: draw(fields[name]) for name in chosen})


@QUICK
@given(settings_=training_settings())
def test_training_settings_are_accepted_or_refused_with_our_error(settings_):
    from hilbertune.training import check_settings

    try:
        check_settings(settings_)
    except InvalidInputError as exc:
        assert str(exc)


@settings(max_examples=5, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(settings_=training_settings(), n=st.integers(2, 10), classes=st.integers(1, 3),
       seed=st.integers(0, 100))
def test_training_finishes_or_raises_our_error(settings_, n, classes, seed):
    # a real (tiny) training run with random settings: 1 qubit, at most 2 steps
    from hilbertune.training import TrainingSettings, train_encoding

    steps = settings_.steps if isinstance(settings_.steps, int) and not isinstance(
        settings_.steps, bool) and 0 <= settings_.steps <= 2 else 1
    settings_ = settings_._replace(steps=steps)
    assert isinstance(settings_, TrainingSettings)
    rng = np.random.default_rng(seed)
    bp = build_encoding("layered", 1, layers=1)
    X = rng.uniform(0, math.pi, size=(n, 1))
    y = rng.integers(0, classes, n)
    try:
        result = train_encoding(bp, X, y, settings_, seed=seed)
    except HilbertuneError:
        return
    for name in ("weights", "biases", "log_bandwidth"):
        assert np.isfinite(np.asarray(result.params[name])).all()
    assert len(result.history) >= 1


def test_bundled_dataset_names_agree_between_cli_and_data():
    # the CLI keeps its own copy of the names so that `--help` does not import scikit-learn
    from hilbertune import cli

    assert tuple(cli.BUNDLED_NAMES) == tuple(data.BUNDLED_NAMES)


@pytest.mark.parametrize("value", ["a\nb", 'quote " and \\ back', "tab\tand\x01ctrl\x7f"])
def test_config_strings_with_control_characters_round_trip(value):
    # a CSV path or target name may hold any character; config.toml must still parse
    config = cfg.resolve_config(overrides=[("data.target", value)])
    assert tomllib.loads(cfg.dump_toml(config))["data"]["target"] == value
