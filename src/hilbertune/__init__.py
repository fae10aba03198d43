"""hilbertune: learn, diagnose, compare and export data-encoding circuits for quantum kernels.

Public API; implementation lives in the submodules. Everything is simulated with JAX on the
CPU: a simulated kernel is no evidence about hardware.
"""

from hilbertune.circuits import (AngleRule, Blueprint, Step, encode_states, initial_params,
                                 is_product, product_factors, resource_counts)
from hilbertune.encodings import (FAMILIES, amplitude_state, bit_flips, build_encoding,
                                  iqp_style, reuploading_layers, single_axis_rotations)
from hilbertune.errors import (ArtifactError, HilbertuneError, InvalidInputError,
                               NotFittedError, ResourceLimitError, TrainingError)
from hilbertune.kernels import (FrozenKernel, fidelity_gram, interference_zero_probability,
                                pauli_expectations, product_gram, projected_gram, quantum_gram)

__version__ = "0.1.0"

__all__ = [
    "AngleRule", "Blueprint", "Step", "encode_states", "initial_params", "is_product",
    "product_factors", "resource_counts",
    "FAMILIES", "amplitude_state", "bit_flips", "build_encoding", "iqp_style",
    "reuploading_layers", "single_axis_rotations",
    "ArtifactError", "HilbertuneError", "InvalidInputError", "NotFittedError",
    "ResourceLimitError", "TrainingError",
    "FrozenKernel", "fidelity_gram", "interference_zero_probability", "pauli_expectations",
    "product_gram", "projected_gram", "quantum_gram",
    "__version__",
]
