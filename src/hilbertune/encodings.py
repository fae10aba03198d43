"""Encoding families: functions that build a ``Blueprint`` for a number of features.

Each family is a pure function of its options; ``build_encoding(family, n_features, ...)``
dispatches by the trade name used in configuration files ("angle", "iqp", "layered",
"amplitude", "basis").
"""

from __future__ import annotations

import difflib
import itertools
import math

from hilbertune.circuits import AngleRule, Blueprint, Step
from hilbertune.errors import InvalidInputError

ENTANGLERS = ("none", "linear", "ring", "all")
SHARING = ("none", "across_layers", "across_qubits")


class _Slots:
    """Hands out trainable slots; rotations with the same sharing key share one slot."""

    def __init__(self, sharing: str, initial: float):
        if sharing not in SHARING:
            close = difflib.get_close_matches(str(sharing), SHARING, n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise InvalidInputError(f"unknown weight sharing {sharing!r}{hint}; use one of "
                                    f"{', '.join(SHARING)}")
        self.sharing, self.initial, self.weights, self.keys = sharing, initial, [], {}

    def slot(self, layer: int, qubits: tuple, role: tuple) -> int:
        """Slot of a rotation in ``layer`` on ``qubits``; ``role`` names what it uploads."""
        key = {"none": (layer, qubits, role), "across_layers": (qubits, role),
               "across_qubits": (layer, len(qubits), role[1:])}[self.sharing]
        if key not in self.keys:
            self.keys[key] = len(self.weights)
            self.weights.append(self.initial)
        return self.keys[key]


def _check_positive(name, value, minimum=1):
    if not isinstance(value, int) or isinstance(value, bool) or value < minimum:
        raise InvalidInputError(f"{name} must be an integer >= {minimum}, got {value!r}")


def _pairs(pattern: str, n: int) -> list:
    if pattern not in ENTANGLERS:
        close = difflib.get_close_matches(str(pattern), ENTANGLERS, n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        raise InvalidInputError(f"unknown pair pattern {pattern!r}{hint}; use one of "
                                f"{', '.join(ENTANGLERS)}")
    if pattern == "none" or n < 2:
        return []
    if pattern == "linear":
        return [(q, q + 1) for q in range(n - 1)]
    if pattern == "ring":
        return [(q, q + 1) for q in range(n - 1)] + ([(n - 1, 0)] if n > 2 else [])
    return list(itertools.combinations(range(n), 2))


def single_axis_rotations(n_features: int, *, axis: str = "y") -> Blueprint:
    """Angle encoding: feature i drives one rotation on qubit i (a product state).

    With ``axis="y"`` the fidelity kernel is ``prod_i cos^2(c (x_i - x'_i) / 2)`` (common
    practice). ``axis="z"`` puts a Hadamard first so the rotation is not a mere phase.
    """
    _check_positive("n_features", n_features)
    if axis not in ("x", "y", "z"):
        raise InvalidInputError(f"rotation axis must be 'x', 'y' or 'z', got {axis!r}")
    steps = []
    for i in range(n_features):
        if axis == "z":
            steps.append(Step("h", (i,)))
        steps.append(Step("r" + axis, (i,), AngleRule("feature", (i,), i)))
    return Blueprint(n_features, n_features, tuple(steps), (1.0,) * n_features,
                     family="angle")


def iqp_style(n_features: int, *, layers: int = 2, pairs: str = "all",
              weight_sharing: str = "none") -> Blueprint:
    """IQP-style encoding (Havlicek et al., Nature 567, 209 (2019)).

    ``layers`` times: Hadamard on every qubit, then ``exp(i sum_i phi_i Z_i + i sum_(i,j)
    phi_ij Z_i Z_j)`` with ``phi_i = x_i`` and ``phi_ij = (pi - x_i)(pi - x_j)`` on the
    chosen pair pattern (features scaled by the bandwidth first). Each phase is trainable:
    RZ / ZZ angle ``w * phi + b`` with initial ``w = -2`` (since exp(i phi Z) = RZ(-2 phi)).
    ``weight_sharing``: "none" (own w, b per gate), "across_layers" (a gate's w, b shared by
    its copies in every layer) or "across_qubits" (one w, b for all RZ and one for all ZZ
    of a layer): fewer trainable parameters for small data sets.
    """
    _check_positive("n_features", n_features)
    _check_positive("layers", layers)
    pair_list = _pairs(pairs, n_features)
    slots = _Slots(weight_sharing, -2.0)
    steps = []
    for layer in range(layers):
        steps += [Step("h", (q,)) for q in range(n_features)]
        for q in range(n_features):
            steps.append(Step("rz", (q,), AngleRule("feature", (q,),
                                                    slots.slot(layer, (q,), ("rz", "z")))))
        for a, b in pair_list:
            steps.append(Step("zz", (a, b), AngleRule("pair", (a, b),
                                                      slots.slot(layer, (a, b), ("zz", "zz")))))
    return Blueprint(n_features, n_features, tuple(steps), tuple(slots.weights), family="iqp")


def reuploading_layers(n_features: int, *, n_qubits: int | None = None, layers: int = 2,
                       entangler: str = "ring", entangler_gate: str = "cz",
                       axes: tuple = ("y", "z"), weight_sharing: str = "none") -> Blueprint:
    """Layered trainable encoding with data re-uploading.

    Each layer: on every qubit, for each assigned feature and each axis, a rotation with
    angle ``w * c * x_f + b`` (own ``w``, ``b`` per rotation); then an entangling pattern
    (``none``, ``linear``, ``ring``, ``all``) of CZ or CNOT gates. With more qubits than
    features the features cycle over the qubits; with more features than qubits, qubit q
    takes every feature f with f % n_qubits == q. ``weight_sharing``: "none" (own w, b per
    rotation), "across_layers" (a rotation's w, b shared by the same qubit, feature and axis
    in every layer: 1/layers of the parameters) or "across_qubits" (one w, b per layer and
    axis for all qubits): fewer trainable parameters for small data sets.
    """
    _check_positive("n_features", n_features)
    n_qubits = n_features if n_qubits is None else n_qubits
    _check_positive("n_qubits", n_qubits)
    _check_positive("layers", layers)
    if entangler_gate not in ("cz", "cnot"):
        raise InvalidInputError(f"entangler_gate must be 'cz' or 'cnot', got {entangler_gate!r}")
    axes = tuple(axes)
    if not axes or any(a not in ("x", "y", "z") for a in axes):
        raise InvalidInputError(f"axes must be a non-empty list of 'x', 'y', 'z', got {axes!r}")
    pair_list = _pairs(entangler, n_qubits)
    if n_features >= n_qubits:
        assigned = [[f for f in range(n_features) if f % n_qubits == q] for q in range(n_qubits)]
    else:
        assigned = [[q % n_features] for q in range(n_qubits)]
    slots = _Slots(weight_sharing, 1.0)
    steps = []
    for layer in range(layers):
        for q in range(n_qubits):
            if axes[0] == "z":  # a Z rotation on |0> would be a global phase
                steps.append(Step("h", (q,)))
            for f in assigned[q]:
                for position, axis in enumerate(axes):
                    slot = slots.slot(layer, (q,), (f, position, axis))
                    steps.append(Step("r" + axis, (q,), AngleRule("feature", (f,), slot)))
        steps += [Step(entangler_gate, pair) for pair in pair_list]
    return Blueprint(n_qubits, n_features, tuple(steps), tuple(slots.weights), family="layered")


def amplitude_state(n_features: int, *, copies: int = 1) -> Blueprint:
    """Amplitude encoding: the normalized feature vector, zero-padded to 2**m amplitudes.

    ``copies = d`` tensors d copies (d * m qubits); the fidelity kernel is then
    ``(x.x' / |x||x'|)^(2d)`` (common practice). Exact state assignment, nothing trainable.
    """
    _check_positive("n_features", n_features)
    _check_positive("copies", copies)
    per_copy = max(1, math.ceil(math.log2(n_features)))
    return Blueprint(per_copy * copies, n_features, (), (), family="amplitude",
                     state_kind="amplitude", copies=copies,
                     frozen=("weights", "biases", "log_bandwidth"))


def bit_flips(n_features: int) -> Blueprint:
    """Basis encoding: bit i of the input sets qubit i (RX(pi * x_i)), a delta kernel."""
    _check_positive("n_features", n_features)
    steps = tuple(Step("rx", (i,), AngleRule("feature", (i,), i)) for i in range(n_features))
    return Blueprint(n_features, n_features, steps, (math.pi,) * n_features, family="basis",
                     frozen=("weights", "biases", "log_bandwidth"), binary_features=True)


FAMILIES = {
    "angle": single_axis_rotations,
    "iqp": iqp_style,
    "layered": reuploading_layers,
    "amplitude": amplitude_state,
    "basis": bit_flips,
}


def build_encoding(family: str, n_features: int, **options) -> Blueprint:
    """Build an encoding by its family name, e.g. ``build_encoding("layered", 4, layers=3)``."""
    if family not in FAMILIES:
        close = difflib.get_close_matches(str(family), FAMILIES, n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        raise InvalidInputError(f"unknown encoding family {family!r}{hint}; use one of "
                                f"{', '.join(FAMILIES)}")
    try:
        return FAMILIES[family](n_features, **options)
    except TypeError as exc:
        raise InvalidInputError(f"encoding {family!r}: {exc}; see help(hilbertune."
                                f"{FAMILIES[family].__name__})") from None
