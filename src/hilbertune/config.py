"""Run configuration: defaults, TOML loading, ``--set key=value`` overrides, validation.

A configuration is a two-level dict ``{section: {key: value}}`` plus the top-level ``seed``.
``resolve_config`` fills every default and validates every value, so the ``config.toml``
written into a run directory is complete and a rerun from it needs nothing else.
"""

from __future__ import annotations

import copy
import difflib
import json
import math
import tomllib
from pathlib import Path

from hilbertune.errors import InvalidInputError

# One place for every option: (default, type, check, help). Types are the TOML types.
_POSITIVE = ("positive", lambda v: v > 0)
_NON_NEGATIVE = ("non-negative", lambda v: v >= 0)
_FRACTION = ("in (0, 1)", lambda v: 0 < v < 1)
_FRACTION0 = ("in [0, 1)", lambda v: 0 <= v < 1)
_UNIT = ("in [0, 1]", lambda v: 0 <= v <= 1)


def _one_of(*names):
    return (f"one of {', '.join(map(repr, names))}", lambda v: v in names)


def _device_found(value) -> bool:
    # 'gpu' is refused here, at the boundary, when JAX sees no GPU (with its own message)
    if value not in ("auto", "cpu", "gpu"):
        return False
    if value == "gpu":
        from hilbertune.kernels import gpu_devices

        if not gpu_devices():
            raise InvalidInputError("config key 'compute.device' is 'gpu' but JAX found no "
                                    "GPU; install jax with CUDA support or set "
                                    "compute.device = 'auto'")
    return True


SCHEMA = {
    # scikit-learn and numpy's legacy generators take seeds below 2**32
    "seed": (0, int, (f"non-negative and at most {2**32 - 1}", lambda v: 0 <= v <= 2**32 - 1),
             "one integer that drives every random choice"),
    "data": {
        "source": ("demo", str, None, "'demo', 'csv', or the name of a scikit-learn dataset "
                   "(iris, wine, breast_cancer, digits, moons, circles)"),
        "path": ("", str, None, "CSV file (source = 'csv')"),
        "target": ("", str, None, "label column of the CSV"),
        "drop_missing": (False, bool, None, "drop rows with missing values instead of failing"),
        "samples": (240, int, _POSITIVE, "rows generated for 'demo', 'moons' and 'circles'"),
        "test_fraction": (0.3, float, _FRACTION, "share of rows held out for testing"),
        "features": (0, int, _NON_NEGATIVE, "features after reduction (0 = one per qubit)"),
        "reduce": ("pca", str, _one_of("pca", "first"), "how to reduce extra features"),
    },
    "encoding": {
        "family": ("layered", str, _one_of("angle", "iqp", "layered", "amplitude", "basis"),
                   "encoding family"),
        "qubits": (4, int, _POSITIVE, "number of qubits (angle/iqp/basis: one per feature)"),
        "layers": (2, int, _POSITIVE, "repeated blocks of the layered and iqp encodings"),
        "entangler": ("ring", str, _one_of("none", "linear", "ring", "all"),
                      "entangling pattern of the layered encoding / pair pattern of iqp"),
        "entangler_gate": ("cz", str, _one_of("cz", "cnot"), "entangling gate (layered)"),
        "axes": (["y", "z"], list, None, "rotation axes per feature upload (layered)"),
        "weight_sharing": ("none", str, _one_of("none", "across_layers", "across_qubits"),
                           "trainable weights shared by a rotation's copies in every layer, or "
                           "by all qubits of a layer (layered, iqp): fewer parameters for "
                           "small data"),
        "axis": ("y", str, _one_of("x", "y", "z"), "rotation axis (angle)"),
        "copies": (1, int, _POSITIVE, "tensor copies (amplitude)"),
        "bandwidth": (0.0, float, ("in [0, 1e6]", lambda v: 0 <= v <= 1e6),
                      "initial bandwidth factor; 0 = median heuristic on the training data"),
        "bias_scale": (0.1, float, _NON_NEGATIVE, "std of the random initial biases"),
        "kind": ("fidelity", str, _one_of("fidelity", "projected"), "kernel built on the states"),
        "gamma": (1.0, float, _POSITIVE, "projected kernel bandwidth"),
    },
    "training": {
        "objective": ("centered_alignment", str,
                      _one_of("alignment", "centered_alignment", "ridge_loo", "ridge_kfold"),
                      "what training optimizes"),
        "steps": (60, int, _POSITIVE, "optimizer steps"),
        "learning_rate": (0.05, float, _POSITIVE, "optimizer learning rate"),
        "optimizer": ("adam", str, _one_of("adam", "adamw", "sgd", "rmsprop"), "optax optimizer"),
        "schedule": ("constant", str, _one_of("constant", "cosine", "warmup_cosine"),
                     "learning-rate schedule"),
        "clip_norm": (1.0, float, _NON_NEGATIVE, "gradient clipping norm (0 = off)"),
        "batch_size": (512, int, _NON_NEGATIVE, "class-balanced mini-batch size; training "
                       "parts of at most this many rows train full batch (0 = always full "
                       "batch)"),
        "validation_fraction": (0.2, float, _FRACTION0, "share of training rows for early stopping"),
        "patience": (20, int, _NON_NEGATIVE, "steps without validation gain before stopping "
                     "(0 = never stop early)"),
        "l2_penalty": (0.0, float, _NON_NEGATIVE, "L2 pull of the learned parameters toward "
                       "their initial values (strength of sum ||p - p0||^2)"),
        "bandwidth_range": (10.0, float, ("0 or at least 1", lambda v: v == 0 or v >= 1),
                            "keep the learned bandwidth within [c0 / r, c0 * r] of its "
                            "initial value c0 (0 = unbounded)"),
        "ridge_lambda": (0.1, float, _POSITIVE, "ridge regularizer of the ridge objectives"),
        "folds": (5, int, ("at least 2", lambda v: v >= 2), "folds of ridge_kfold"),
        "freeze": ([], list, None, "parameter names left untrained: weights, biases, log_bandwidth"),
        "checkpoint_every": (10, int, _NON_NEGATIVE, "steps between checkpoints (0 = none)"),
    },
    "selection": {
        "candidates": (["untrained", "rescaled", "full"], list, None,
                       "kernels compared by inner cross-validation on the training part: "
                       "'untrained' (always included), 'rescaled' (untrained with the "
                       "bandwidth times each of selection.bandwidth_factors), 'bandwidth' "
                       "(only the bandwidth learned), 'full' (weights, biases and bandwidth "
                       "learned)"),
        "bandwidth_factors": ([0.25, 0.5, 2.0, 4.0], list, None,
                              "bandwidth factors of the 'rescaled' candidates"),
        "objectives": ([], list, None,
                       "objectives of the learned candidates (alignment, centered_alignment, "
                       "ridge_loo, ridge_kfold); [] = training.objective and ridge_loo (the "
                       "default set of experiments/accuracy_study.py)"),
        "trajectory": ([0.25, 1.0], list, None, "fractions of training.steps at which full "
                       "training is a candidate (early stopping chosen by inner CV)"),
        "folds": (5, int, ("at least 2", lambda v: v >= 2),
                  "stratified inner folds on the training part"),
        "repeats": (0, int, _NON_NEGATIVE, "times the inner K-fold split is drawn (0 = "
                    "enough for 200 held-out predictions per candidate, at most 5)"),
        "rule": ("paired", str, _one_of("paired", "one_standard_error",
                                        "best_or_untrained", "best"),
                 "how a candidate is chosen: paired = the best if its fold-by-fold gain over "
                 "the untrained encoding exceeds one standard error of that paired "
                 "difference (Nadeau & Bengio 2003), else the untrained encoding; "
                 "one_standard_error = the simplest within one standard error of the best "
                 "(Hastie et al. 2009, 7.10); best_or_untrained = the best unless the "
                 "untrained encoding is within one standard error of it; best = the best "
                 "mean"),
    },
    "svm": {
        "C": (0.0, float, _NON_NEGATIVE, "SVM regularization; 0 = tuned by cross-validation"),
        "cv_folds": (5, int, ("at least 2", lambda v: v >= 2), "folds for tuning C and baselines"),
    },
    "evaluation": {
        "repeats": (5, int, ("at least 2", lambda v: v >= 2),
                    "repeated stratified splits for the paired significance test"),
        "alpha": (0.05, float, _FRACTION, "significance level"),
        "shots": (1000, int, _POSITIVE, "shots per kernel entry for the noise-floor diagnostic"),
    },
    "hardware": {
        "enabled": (True, bool, None, "estimate shot budget and device noise in the report"),
        "estimator": ("inversion_test", str,
                      _one_of("inversion_test", "hadamard_test", "swap_test"),
                      "circuit that estimates each kernel entry"),
        "shots_grid": ([64, 256, 1024, 4096], list, None, "shot counts for the budget curve"),
        "tolerance": (0.02, float, _UNIT, "accepted test-accuracy loss against the exact kernel"),
        "one_qubit_error": (0.001, float, _UNIT, "depolarizing error per 1-qubit gate"),
        "two_qubit_error": (0.01, float, _UNIT, "depolarizing error per 2-qubit gate"),
        "readout_error": (0.0, float, _UNIT, "probability that a measured bit reads wrong "
                          "(independent, symmetric; 0 = off; give your device's figure)"),
    },
    "compute": {
        "memory_budget": ("4GiB", str, None, "memory allowed for states and Gram matrices "
                          "(e.g. '4GiB', '500MB', or an integer number of bytes)"),
        "chunk_size": (0, int, _NON_NEGATIVE,
                       "samples per state chunk (0 = automatic, about 4 MiB of states)"),
        "workers": (0, int, _NON_NEGATIVE, "threads for repeated splits (0 = one per core, at "
                    "most 4); results do not depend on it"),
        "compile_cache": ("auto", str, None, "folder of JAX's persistent compilation cache, "
                          "reused by later runs and sweep trials ('auto' = the user's cache "
                          "folder, '' = off)"),
        "device": ("auto", str, ("one of 'auto', 'cpu', 'gpu'", _device_found),
                   "where states and Grams are computed: 'auto' (a GPU when JAX has one, "
                   "else the CPU with BLAS), 'cpu', or 'gpu' (refused when none is found)"),
    },
}


# Names this tool no longer takes. A user who gives one gets the new name in one line (no
# silent alias); `runs.load_run` maps them explicitly for run directories written before.
RETIRED_KEYS = {"encoding.reps": "encoding.layers"}
RETIRED_VALUES = {("hardware.estimator", "compute_uncompute"): "inversion_test"}


def retired_key_error(dotted: str) -> InvalidInputError:
    return InvalidInputError(f"config key '{dotted}' was renamed to '{RETIRED_KEYS[dotted]}'; "
                             f"write {RETIRED_KEYS[dotted]} instead")


def defaults() -> dict:
    """A fresh dict of every default value."""
    out = {}
    for key, spec in SCHEMA.items():
        if isinstance(spec, dict):
            out[key] = {k: copy.deepcopy(v[0]) for k, v in spec.items()}
        else:
            out[key] = copy.deepcopy(spec[0])
    return out


def all_keys() -> list:
    """Every dotted key, e.g. ``training.steps``."""
    keys = []
    for key, spec in SCHEMA.items():
        keys += [f"{key}.{k}" for k in spec] if isinstance(spec, dict) else [key]
    return keys


def _unknown(key: str) -> InvalidInputError:
    if key in RETIRED_KEYS:
        return retired_key_error(key)
    close = difflib.get_close_matches(key, all_keys(), n=1, cutoff=0.5)
    if not close:  # a bare option name given without its section
        close = [k for k in all_keys() if k.split(".")[-1] == key.split(".")[-1]][:1]
    hint = f"; did you mean '{close[0]}'?" if close else "; see `hilbertune fit --help-config`"
    return InvalidInputError(f"unknown config key {key!r}{hint}")


def _spec(dotted: str):
    parts = dotted.split(".")
    if len(parts) == 1 and parts[0] in SCHEMA and not isinstance(SCHEMA[parts[0]], dict):
        return SCHEMA[parts[0]]
    if len(parts) == 2 and isinstance(SCHEMA.get(parts[0]), dict) and parts[1] in SCHEMA[parts[0]]:
        return SCHEMA[parts[0]][parts[1]]
    raise _unknown(dotted)


def _coerce(dotted: str, value):
    default, kind, check, _ = _spec(dotted)
    if dotted == "compute.memory_budget" and isinstance(value, int) and \
            not isinstance(value, bool):
        if value < 1:
            raise InvalidInputError(f"config key '{dotted}' must be at least 1 byte, got "
                                    f"{value!r}; write e.g. '4GiB'")
        value = str(value)  # the same text as the quoted number of bytes
    if kind is float and isinstance(value, int) and not isinstance(value, bool):
        value = float(value)
    if kind is bool and not isinstance(value, bool) or \
            kind is not bool and (isinstance(value, bool) or not isinstance(value, kind)):
        raise InvalidInputError(f"config key '{dotted}' must be {kind.__name__} "
                                f"(like {default!r}), got {value!r}")
    if kind is float and not math.isfinite(value):
        raise InvalidInputError(f"config key '{dotted}' must be finite, got {value!r}")
    if isinstance(value, str) and (dotted, value) in RETIRED_VALUES:
        raise InvalidInputError(f"config key '{dotted}': {value!r} was renamed to "
                                f"{RETIRED_VALUES[dotted, value]!r}; write {dotted} = "
                                f"\"{RETIRED_VALUES[dotted, value]}\" instead")
    if check is not None and not check[1](value):
        raise InvalidInputError(f"config key '{dotted}' must be {check[0]}, got {value!r}")
    return value


def _walk(user: dict, prefix=""):
    for key, value in user.items():
        dotted = f"{prefix}{key}"
        if isinstance(value, dict):
            if prefix or not isinstance(SCHEMA.get(key), dict):
                raise _unknown(dotted)
            yield from _walk(value, dotted + ".")
        else:
            yield dotted, value


def set_key(config: dict, dotted: str, value) -> None:
    """Set one dotted key in place after type and range checks."""
    value = _coerce(dotted, value)
    parts = dotted.split(".")
    if len(parts) == 1:
        config[parts[0]] = value
    else:
        config[parts[0]][parts[1]] = value


def parse_assignment(text: str) -> tuple:
    """Parse ``key=value`` (value in TOML syntax; bare words are strings)."""
    if "=" not in text:
        raise InvalidInputError(f"--set expects key=value (e.g. training.steps=100), got {text!r}")
    key, raw = (part.strip() for part in text.split("=", 1))
    try:
        value = tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw  # a bare word such as iqp
    return key, value


def resolve_config(user: dict | None = None, overrides=()) -> dict:
    """Defaults, then the user's dict, then ``(key, value)`` overrides; all validated."""
    config = defaults()
    for dotted, value in _walk(user or {}):
        set_key(config, dotted, value)
    for dotted, value in overrides:
        set_key(config, dotted, value)
    check_consistency(config)
    return config


def check_consistency(config: dict) -> None:
    """Cross-key rules that single-key checks cannot see."""
    data, enc = config["data"], config["encoding"]
    if data["source"] == "csv" and (not data["path"] or not data["target"]):
        raise InvalidInputError("a CSV source needs data.path and data.target: pass "
                                "--data FILE.csv --target COLUMN")
    if any(a not in ("x", "y", "z") for a in enc["axes"]) or not enc["axes"]:
        raise InvalidInputError(f"encoding.axes must be a non-empty list of 'x', 'y', 'z', "
                                f"got {enc['axes']!r}")
    bad = [f for f in config["training"]["freeze"] if f not in ("weights", "biases",
                                                                "log_bandwidth")]
    if bad:
        raise InvalidInputError(f"training.freeze names unknown parameters {bad}; use "
                                "weights, biases, log_bandwidth")
    check_selection(config)
    shots = config["hardware"]["shots_grid"]
    if not shots or any(not isinstance(s, int) or isinstance(s, bool) or s <= 0 for s in shots):
        raise InvalidInputError(f"hardware.shots_grid must be a non-empty list of positive "
                                f"integers, got {shots!r}")


def check_selection(config: dict) -> None:
    """The [selection] lists: known names, fractions in (0, 1], something to compare."""
    from hilbertune.objectives import OBJECTIVES
    from hilbertune.selection import SCOPES

    sel = config["selection"]
    names = sel["candidates"]
    bad = [c for c in names if c not in SCOPES]
    if bad:
        close = [difflib.get_close_matches(str(c), SCOPES, n=1) for c in bad]
        hint = "".join(f" (did you mean {m[0]!r}?)" for m in close if m)
        raise InvalidInputError(f"selection.candidates names unknown candidate(s) {bad}{hint}; "
                                f"use some of {', '.join(SCOPES)}")
    if not names:
        raise InvalidInputError("selection.candidates is empty, so nothing can be chosen; list "
                                "at least 'untrained' (e.g. [\"untrained\", \"bandwidth\", "
                                "\"full\"])")
    bad = [o for o in sel["objectives"] if o not in OBJECTIVES]
    if bad:
        raise InvalidInputError(f"selection.objectives names unknown objective(s) {bad}; use "
                                f"some of {', '.join(OBJECTIVES)}")
    factors = sel["bandwidth_factors"]
    if any(isinstance(f, bool) or not isinstance(f, (int, float)) or not 0 < f < math.inf
           or f == 1 for f in factors):
        raise InvalidInputError(f"selection.bandwidth_factors must be positive numbers other "
                                f"than 1, got {factors!r}")
    fractions = sel["trajectory"]
    if not fractions or any(isinstance(f, bool) or not isinstance(f, (int, float))
                            or not 0 < f <= 1 for f in fractions):
        raise InvalidInputError(f"selection.trajectory must be a non-empty list of fractions in "
                                f"(0, 1] of training.steps, got {fractions!r}")


def load_toml(path) -> dict:
    """Read a TOML file; errors name the file and line and say how to fix them."""
    path = Path(path)
    if path.is_dir():
        raise InvalidInputError(f"{str(path)!r} is a folder, not a config file; pass a TOML "
                                "file (the data go with --data FILE.csv --target COLUMN)")
    if not path.is_file():
        raise InvalidInputError(f"config file {str(path)!r} not found; check the path")
    try:
        text = path.read_bytes().decode("utf-8")
    except UnicodeDecodeError:
        raise InvalidInputError(f"config file {str(path)!r} is not UTF-8 text; save it as a "
                                "TOML text file") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InvalidInputError(f"config file {str(path)!r} is not valid TOML: {exc}; fix that "
                                "line") from None


def dump_toml(config: dict) -> str:
    """Write a resolved config as TOML (flat sections of scalars and lists)."""
    def fmt(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            # a TOML basic string: JSON's escapes (\\ \" \n \uXXXX ...) are TOML's too; DEL
            # must be escaped in TOML but not in JSON (TOML 1.0, "String")
            return json.dumps(v, ensure_ascii=False).replace("\x7f", "\\u007f")
        if isinstance(v, float):
            return repr(v)
        if isinstance(v, list):
            return "[" + ", ".join(fmt(x) for x in v) + "]"
        return str(v)

    lines = [f"{k} = {fmt(v)}" for k, v in config.items() if not isinstance(v, dict)]
    for section, values in config.items():
        if isinstance(values, dict):
            lines += ["", f"[{section}]"] + [f"{k} = {fmt(v)}" for k, v in values.items()]
    return "\n".join(lines) + "\n"


def describe() -> str:
    """Every key with its default and meaning, for ``--help-config``."""
    rows = []
    for dotted in all_keys():
        default, kind, check, text = _spec(dotted)
        rule = f" ({check[0]})" if check else ""
        rows.append(f"{dotted} = {default!r}{rule}: {text}")
    return "\n".join(rows)
