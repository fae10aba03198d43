"""The device path (pure XLA, what a GPU runs) forced on the CPU, against the host BLAS path
and against independent float64 numpy computations (the dense simulator of conftest.py);
full-precision products; the compute.device setting and the device memory budget."""

from __future__ import annotations

import math

import numpy as np
import pytest
import jax
import jax.extend.core
import jax.numpy as jnp

from hilbertune import artifacts, cli, config, encodings, kernels, training
from hilbertune.circuits import AngleRule, Blueprint, Step, encode_states, product_factors
from hilbertune.errors import InvalidInputError, ResourceLimitError


def _layered(n=4, layers=2):
    return encodings.reuploading_layers(n, layers=layers, entangler="ring", entangler_gate="cz")


def encodings_params(bp, rng):
    p = bp.n_slots
    return {"weights": rng.normal(size=p).astype(np.float32),
            "biases": rng.normal(size=p).astype(np.float32),
            "log_bandwidth": np.float32(math.log(rng.uniform(0.5, 1.5)))}


def _host_and_device(fn):
    with kernels.engine_path("host"):
        host = fn()
    with kernels.engine_path("device"):
        device = fn()
    return host, device


def _primitives(jaxpr, found=None):
    """Every equation of a jaxpr and of its sub-jaxprs (scan, custom_vjp, pjit, ...)."""
    found = [] if found is None else found
    for eqn in jaxpr.eqns:
        found.append(eqn)
        for value in eqn.params.values():
            for sub in value if isinstance(value, (tuple, list)) else (value,):
                if isinstance(sub, jax.extend.core.ClosedJaxpr):
                    _primitives(sub.jaxpr, found)
                elif isinstance(sub, jax.extend.core.Jaxpr):
                    _primitives(sub, found)
    return found


def _reference_gram(states_a, states_b):
    # |<a|b>|^2 in float64 numpy from complex128 reference states (definition)
    return np.abs(states_a.conj() @ states_b.T) ** 2


# --------------------------------------------------------------------------- the switch

def test_engine_path_switch_and_its_default():
    assert kernels.compute_platform() == "cpu"  # this test suite runs without a GPU
    assert not kernels.device_path()  # auto on a CPU: host BLAS path
    with kernels.engine_path("device"):
        assert kernels.device_path()
        assert "device path" in kernels.compute_device()
        with kernels.engine_path("host"):
            assert not kernels.device_path()
        assert kernels.device_path()
    assert not kernels.device_path()
    with pytest.raises(InvalidInputError, match="engine path"):
        kernels.set_engine_path("gpu-ish")


def test_device_path_returns_device_arrays_and_host_path_numpy(rng):
    bp = _layered(3)
    X = rng.uniform(-2, 2, size=(10, 3))
    params = encodings_params(bp, rng)
    host, device = _host_and_device(lambda: kernels.quantum_gram(bp, params, X))
    assert isinstance(host, np.ndarray)  # herk on the host
    assert isinstance(device, jax.Array)  # stayed on the device


# --------------------------------------------------------------------------- same numbers

@pytest.mark.parametrize("family", ["layered", "iqp"])
def test_symmetric_gram_device_equals_host_and_float64_reference(family, dense, rng):
    bp = _layered(4) if family == "layered" else encodings.iqp_style(4, layers=2)
    params = dense.random_params(bp, rng)
    X = rng.uniform(-2, 2, size=(23, 4))
    host, device = _host_and_device(lambda: kernels.quantum_gram(bp, params, X))
    device = np.asarray(device)
    states = dense.states(bp, params, X)  # complex128 numpy reference
    np.testing.assert_allclose(device, _reference_gram(states, states), atol=2e-5)
    np.testing.assert_allclose(device, host, atol=1e-5)
    assert np.array_equal(device, device.T)  # exactly symmetric, as the host path
    assert np.all(np.diag(device) == 1.0)
    # the check has teeth: off-diagonal values spread well away from a constant
    assert np.ptp(device[np.triu_indices(23, 1)]) > 0.1


@pytest.mark.parametrize("block_rows", [None, 7])
def test_test_versus_train_gram_device_equals_host_and_reference(block_rows, dense, rng):
    bp = _layered(4)
    params = dense.random_params(bp, rng)
    X, Y = rng.uniform(-2, 2, size=(17, 4)), rng.uniform(-2, 2, size=(30, 4))
    s_x, s_y = encode_states(bp, params, X), encode_states(bp, params, Y)
    host, device = _host_and_device(
        lambda: kernels.fidelity_gram(s_y, s_x, block_rows=block_rows))
    assert isinstance(device, jax.Array)
    reference = _reference_gram(dense.states(bp, params, Y), dense.states(bp, params, X))
    np.testing.assert_allclose(np.asarray(device), reference, atol=2e-5)
    np.testing.assert_allclose(np.asarray(device), host, atol=1e-5)
    # the symmetric Gram in row blocks too
    host, device = _host_and_device(lambda: kernels.fidelity_gram(s_y, block_rows=block_rows))
    reference = _reference_gram(dense.states(bp, params, Y), dense.states(bp, params, Y))
    np.testing.assert_allclose(np.asarray(device), reference, atol=2e-5)
    np.testing.assert_allclose(np.asarray(device), host, atol=1e-5)


def test_training_value_and_gradient_device_equal_host_and_reference(dense, rng, monkeypatch):
    # HOST_PRODUCT_WORK = 1: the host path takes the pure_callback (herk) even at this size
    monkeypatch.setattr(training, "HOST_PRODUCT_WORK", 1)
    bp = _layered(3, layers=2)
    params = dense.random_params(bp, rng)
    X = rng.uniform(-2, 2, size=(9, 3)).astype(np.float32)
    weights = rng.normal(size=(9, 9))

    def loss(p):
        return jnp.sum(weights * training.training_gram(bp, p, X))

    start = {k: jnp.asarray(v) for k, v in params.items()}
    (v_host, g_host), (v_dev, g_dev) = _host_and_device(
        lambda: jax.value_and_grad(loss)(start))

    def loss_reference(p):
        s = dense.states(bp, p, X)  # float64 numpy reference
        return float(np.sum(weights * _reference_gram(s, s)))

    assert abs(float(v_dev) - loss_reference(params)) < 1e-4 * max(1, abs(float(v_dev)))
    assert abs(float(v_dev) - float(v_host)) < 1e-5 * max(1, abs(float(v_dev)))
    h = 1e-5
    for name in ("log_bandwidth", "weights", "biases"):
        np.testing.assert_allclose(np.asarray(g_dev[name]), np.asarray(g_host[name]),
                                   rtol=1e-4, atol=1e-4)
    for name, index in (("log_bandwidth", None), ("weights", 1), ("biases", 4)):
        up = {k: np.array(v, np.float64) for k, v in params.items()}
        down = {k: np.array(v, np.float64) for k, v in params.items()}
        if index is None:
            up[name], down[name] = up[name] + h, down[name] - h
        else:
            up[name][index] += h
            down[name][index] -= h
        # central difference of the float64 reference (common practice)
        numeric = (loss_reference(up) - loss_reference(down)) / (2 * h)
        analytic = float(g_dev[name] if index is None else g_dev[name][index])
        assert abs(analytic - numeric) < 2e-3 * max(1.0, abs(numeric))


def _product_blueprint(n, rng):
    # a product encoding whose qubits have X, Y and Z Bloch components (H, RX, RZ, RY)
    steps, weights = [], []
    for q in range(n):
        steps.append(Step("h", (q,)))
        for axis in ("x", "z"):
            steps.append(Step("r" + axis, (q,), AngleRule("feature", (q % 3,), len(weights))))
            weights.append(float(rng.normal()))
        steps.append(Step("ry", (q,), AngleRule("free", (), len(weights))))
        weights.append(0.7)
    return Blueprint(n, 3, tuple(steps), tuple(weights))


@pytest.mark.parametrize("n_qubits", [5, 27])
def test_product_kernel_device_equals_host_and_reference(n_qubits, dense, rng):
    # 27 qubits: two fused passes of 20 with 13 padded qubits on both paths
    bp = _product_blueprint(n_qubits, rng)
    # bandwidths that keep the kernel values spread (many qubits: a smaller one)
    params = dense.random_params(bp, rng, bandwidth_range=(1.0, 2.0) if n_qubits < 10
                                 else (0.3, 0.5))
    X, Y = rng.uniform(-1, 1, size=(21, 3)), rng.uniform(-1, 1, size=(13, 3))
    fx, fy = product_factors(bp, params, X), product_factors(bp, params, Y)
    for symmetric in (True, False):
        host, device = _host_and_device(
            lambda: kernels.product_gram(fx, None if symmetric else fy))
        assert isinstance(device, jax.Array)
        a = np.asarray(fx, np.complex128)
        b = a if symmetric else np.asarray(fy, np.complex128)
        # prod_q |<a_q|b_q>|^2 from the per-qubit states in float64 (definition of the
        # fidelity of product states)
        reference = np.prod(np.abs(np.einsum("iqc,jqc->ijq", a.conj(), b)) ** 2, axis=2)
        np.testing.assert_allclose(np.asarray(device), reference, atol=2e-5, rtol=2e-4)
        np.testing.assert_allclose(np.asarray(device), host, atol=1e-6, rtol=1e-5)
        assert reference.max() - reference.min() > 0.1  # not a constant matrix
    if n_qubits == 5:  # the per-qubit factors against the dense simulator's states
        full = dense.states(bp, params, X)
        product = np.asarray(kernels.product_gram(fx))
        np.testing.assert_allclose(product, _reference_gram(full, full), atol=2e-5)


def test_projected_kernel_device_equals_host_and_reference(dense, rng):
    bp = _layered(3)
    params = dense.random_params(bp, rng)
    X, Y = rng.uniform(-2, 2, size=(12, 3)), rng.uniform(-2, 2, size=(8, 3))
    host, device = _host_and_device(
        lambda: kernels.projected_gram(bp, params, Y, X, gamma=0.7))
    s_y, s_x = dense.states(bp, params, Y), dense.states(bp, params, X)

    def expectations(states):
        # <P_q> = <psi| P on qubit q |psi> with dense Pauli operators (numpy float64)
        out = np.empty((states.shape[0], 3, 3))
        for q in range(3):
            for k, pauli in enumerate((dense.X, dense.Y, dense.Z)):
                op = dense.embed({q: pauli}, 3)
                out[:, q, k] = np.einsum("bi,ij,bj->b", states.conj(), op, states).real
        return out

    e_y, e_x = expectations(s_y), expectations(s_x)
    # Huang et al., Nat. Commun. 12, 2631 (2021), Eq. 9 with ||rho - rho'||_F^2 =
    # 1/2 sum_P (<P> - <P>')^2
    sq = 0.5 * np.sum((e_y[:, None] - e_x[None]) ** 2, axis=(2, 3))
    reference = np.exp(-0.7 * sq)
    np.testing.assert_allclose(np.asarray(device), reference, atol=2e-5)
    np.testing.assert_allclose(np.asarray(device), np.asarray(host), atol=1e-6)


def test_frozen_kernel_predictions_agree_across_paths(rng):
    from sklearn.svm import SVC

    bp = _layered(3)
    params = encodings_params(bp, rng)
    X = rng.uniform(-2, 2, size=(40, 3))
    y = (X[:, 0] * X[:, 1] > 0).astype(int)
    kernel = kernels.FrozenKernel(bp, params)

    def fit_predict():
        k_test = kernel(X[30:], X[:30])
        model = SVC(kernel="precomputed").fit(kernel(X[:30]), y[:30])
        return k_test, model.decision_function(k_test), model.predict(k_test)

    (k_host, d_host, p_host), (k_dev, d_dev, p_dev) = _host_and_device(fit_predict)
    assert k_dev.dtype == np.float64  # handed to scikit-learn as float64 numpy
    np.testing.assert_allclose(k_dev, k_host, atol=1e-5)
    # libsvm stops at a tolerance of 1e-3 (scikit-learn's SVC tol), so the decision
    # values of two kernels 1e-6 apart agree to about that, and the labels exactly
    np.testing.assert_allclose(d_dev, d_host, atol=5e-3)
    assert np.array_equal(p_dev, p_host)


# --------------------------------------------------------------------------- pure XLA

def _training_jaxpr(bp, X):
    params = {k: jnp.asarray(v) for k, v in encodings_params(bp, np.random.default_rng(0)).items()}
    return jax.make_jaxpr(jax.value_and_grad(
        lambda p: jnp.sum(training.training_gram(bp, p, X))))(params)


def test_device_path_has_no_callbacks_where_the_host_path_has_one(monkeypatch):
    monkeypatch.setattr(training, "HOST_PRODUCT_WORK", 1)
    bp = _layered(3)
    X = jnp.asarray(np.random.default_rng(1).uniform(-1, 1, size=(8, 3)), jnp.float32)
    host, device = _host_and_device(lambda: _training_jaxpr(bp, X))
    names = lambda jaxpr: {eqn.primitive.name for eqn in _primitives(jaxpr.jaxpr)}
    assert any("callback" in name for name in names(host))  # the check can see one
    assert not any("callback" in name for name in names(device))


def test_a_compiled_training_gram_follows_a_change_of_path(monkeypatch):
    # the decision is made while tracing: a function compiled on one path must be traced
    # again after a switch, not reuse its cached program
    monkeypatch.setattr(training, "HOST_PRODUCT_WORK", 1)
    compiled = jax.jit(training.symmetric_fidelity_gram)
    states = jnp.ones((4, 8), jnp.complex64) / math.sqrt(8)
    with kernels.engine_path("host"):
        compiled(states)
        assert "callback" in compiled.lower(states).as_text()
    with kernels.engine_path("device"):
        compiled(states)
        assert "callback" not in compiled.lower(states).as_text()


def _dot_precisions(jaxpr):
    return [eqn.params.get("precision") for eqn in _primitives(jaxpr.jaxpr)
            if eqn.primitive.name == "dot_general"]


def test_every_kernel_and_angle_product_runs_at_full_precision(rng):
    # TF32 (XLA's default float32 product on GPUs) would round these; on the CPU the
    # numbers cannot show it, so the compiled program is inspected: every dot_general
    # must carry Precision.HIGHEST.
    highest = (jax.lax.Precision.HIGHEST, jax.lax.Precision.HIGHEST)
    bp_big = encodings.iqp_style(8, layers=1)  # >= 8 qubits: product prefix as a product
    X8 = jnp.asarray(rng.uniform(-1, 1, size=(6, 8)), jnp.float32)
    params8 = {k: jnp.asarray(v) for k, v in encodings_params(bp_big, rng).items()}
    bp_prod = _product_blueprint(3, rng)
    X3 = jnp.asarray(rng.uniform(-1, 1, size=(6, 3)), jnp.float32)
    params3 = {k: jnp.asarray(v) for k, v in encodings_params(bp_prod, rng).items()}
    with kernels.engine_path("device"):
        programs = {
            "states (parity-table phases, product prefix)": jax.make_jaxpr(
                lambda p: encode_states(bp_big, p, X8))(params8),
            "training value and gradient": _training_jaxpr(_layered(3), X3),
            "product kernel factors and closed form": jax.make_jaxpr(jax.grad(
                lambda p: jnp.sum(kernels.gram_for_training(bp_prod, p, X3))))(params3),
            "projected kernel": jax.make_jaxpr(lambda p: kernels.projected_gram_from_expectations(
                kernels.encoding_expectations(_layered(3), p, X3),
                kernels.encoding_expectations(_layered(3), p, X3), 1.0))(
                {k: jnp.asarray(v) for k, v in encodings_params(_layered(3), rng).items()}),
            "device Gram": jax.make_jaxpr(lambda s: kernels._device_gram(s, s, 2))(
                jnp.ones((5, 8), jnp.complex64)),
        }
    for name, program in programs.items():
        precisions = _dot_precisions(program)
        assert precisions, f"{name}: no matrix product found, the check would be empty"
        assert all(p == highest for p in precisions), f"{name}: {precisions}"


def test_precision_inspection_sees_a_default_product():
    # the inspection above can fail: a plain product carries no HIGHEST precision
    program = jax.make_jaxpr(lambda a: a @ a.T)(jnp.ones((3, 3)))
    assert _dot_precisions(program) and all(
        p != (jax.lax.Precision.HIGHEST,) * 2 for p in _dot_precisions(program))


# --------------------------------------------------------------------------- configuration

def test_compute_device_key_checked_and_gpu_refused_without_one():
    assert config.defaults()["compute"]["device"] == "auto"
    for value in ("auto", "cpu"):
        assert config.resolve_config({"compute": {"device": value}})["compute"]["device"] == value
    with pytest.raises(InvalidInputError, match="one of 'auto', 'cpu', 'gpu'"):
        config.resolve_config({"compute": {"device": "cuda"}})
    with pytest.raises(InvalidInputError, match="found no GPU"):
        config.resolve_config({"compute": {"device": "gpu"}})


def test_fit_with_gpu_but_none_found_exits_2_with_one_line(tmp_path, capsys):
    code = cli.main(["fit", "--set", "compute.device=gpu", "--out", str(tmp_path / "run")])
    _, err = capsys.readouterr()
    assert code == 2
    assert len(err.strip().splitlines()) == 1 and "found no GPU" in err
    assert not (tmp_path / "run").exists()


def test_select_device_applies_the_setting():
    try:
        kernels.select_device("cpu")
        assert not kernels.device_path() and kernels.compute_platform() == "cpu"
        with pytest.raises(InvalidInputError, match="found no GPU"):
            kernels.select_device("gpu")
        with pytest.raises(InvalidInputError, match="compute.device"):
            kernels.select_device("tpu")
    finally:
        kernels.select_device("auto")
    assert jax.config.jax_default_device is None and not kernels.device_path()


def test_run_records_name_the_device_and_path():
    versions = artifacts.library_versions()
    assert versions["compute_device"] == "cpu: cpu (host BLAS path)"
    with kernels.engine_path("device"):
        assert artifacts.library_versions()["compute_device"] == "cpu: cpu (device path)"


# --------------------------------------------------------------------------- device memory

class _FakeAccelerator:
    platform = "gpu"
    device_kind = "fake accelerator"

    def memory_stats(self):
        return {"bytes_limit": 3 * 2**20, "bytes_in_use": 2**20}


def test_device_memory_read_from_memory_stats(monkeypatch):
    assert kernels.device_memory_available() is None  # a CPU: the host budget stands
    monkeypatch.setattr(kernels, "compute_platform", lambda: "gpu")
    monkeypatch.setattr(kernels, "_default_device", lambda: _FakeAccelerator())
    assert kernels.device_memory_available() == 2 * 2**20  # limit - in use


def test_budget_refers_to_device_memory_and_guard_refuses_before_allocating(monkeypatch, rng):
    monkeypatch.setattr(kernels, "device_memory_available", lambda: 2**20)
    assert kernels.resolve_memory_budget(None) == 2**19  # half the free device memory
    assert kernels.resolve_memory_budget("4GiB") == 2**20  # never above what is free
    assert kernels.resolve_memory_budget(1000) == 1000

    def no_states(*args, **kwargs):
        raise AssertionError("states were computed before the budget check")

    monkeypatch.setattr(kernels, "encode_states", no_states)
    bp = _layered(10)  # 300 states x 1024 amplitudes x 8 bytes = 2.3 MiB > 1 MiB free
    with kernels.engine_path("device"):
        with pytest.raises(ResourceLimitError, match="budget"):
            kernels.quantum_gram(bp, encodings_params(bp, rng),
                                 rng.uniform(-1, 1, size=(300, 10)), memory_budget="4GiB")


# --------------------------------------------------------------------------- benchmarks

def test_gram_benchmark_measures_both_paths_side_by_side():
    import json
    import os
    import subprocess
    import sys
    from pathlib import Path

    script = Path(__file__).resolve().parents[1] / "experiments" / "bench_gram.py"
    done = subprocess.run([sys.executable, str(script), "--quick", "--device-path", "--only",
                           "product", "--repeats", "1"], capture_output=True, text=True,
                          timeout=600, env={**os.environ}, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    report = json.loads(done.stdout)
    assert report["engine"]["paths"] == ["host", "device"]
    assert report["engine"]["compute_device_device_path"].endswith("(device path)")
    both = report["paths_side_by_side"]["product.ratio_total_over_rbf"]
    assert both["host"] > 0 and both["device"] > 0
