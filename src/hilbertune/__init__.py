"""hilbertune: learn, diagnose, compare and export data-encoding circuits for quantum kernels.

Public API; the implementation lives in the submodules (data -> encodings/circuits ->
kernels -> objectives/training -> diagnostics/hardware -> runs/report/qasm/sweeps).
Everything is simulated with JAX on the CPU: a simulated kernel is no evidence about
quantum hardware.
"""

import os as _os

# OpenBLAS workers busy-wait ~0.1 s after every call by default and starve the XLA threads
# that run next on a small machine (N=1000, 10 qubits: Gram 40 ms -> 29 ms; see
# DEVELOPERS.md, "Threads"). Let them sleep after ~1e6 cycles instead. Takes effect for
# the BLAS libraries that load after this line; a value set by the user wins.
_os.environ.setdefault("OPENBLAS_THREAD_TIMEOUT", "20")

from hilbertune.circuits import (AngleRule, Blueprint, Step, encode_states, initial_params,
                                 is_product, product_factors, resource_counts)
from hilbertune.config import resolve_config
from hilbertune.data import (Dataset, Preprocessing, Split, invented_demo, load_bundled,
                             load_csv, split_and_scale)
from hilbertune.diagnostics import (alignment_of, classical_gram_health, compare_accuracies,
                                    concentration, corrected_resampled_t_test,
                                    effective_dimension, geometric_difference,
                                    geometric_difference_curve, linear_svm, mcnemar_exact,
                                    repeated_split_scores, spectrum, tuned_rbf_svm)
from hilbertune.encodings import (FAMILIES, amplitude_state, bit_flips, build_encoding,
                                  iqp_style, reuploading_layers, single_axis_rotations)
from hilbertune.errors import (ArtifactError, HilbertuneError, InvalidInputError,
                               NotFittedError, ResourceLimitError, TrainingError)
from hilbertune.hardware import (clip_eigenvalues, density_matrix_expectations,
                                 density_matrix_kernel, depolarize_kernel,
                                 inversion_test_depolarizing, projected_entry_variance,
                                 projected_shot_budget, projected_shrink, readout_kernel,
                                 repair_gram, restore_unit_diagonal, sample_expectations,
                                 shift_spectrum, shot_budget, shot_sampled_gram, shot_variance)
from hilbertune.kernels import (FrozenKernel, fidelity_gram, interference_zero_probability,
                                pauli_expectations, product_gram, projected_gram, quantum_gram)
from hilbertune.estimator import EncodingClassifier
from hilbertune.objectives import (OBJECTIVES, centered_alignment, kernel_alignment,
                                   objective_loss, ridge_kfold_loss, ridge_loo_loss,
                                   target_matrix)
from hilbertune.training import (SvmChoice, TrainingResult, TrainingSettings, train_encoding,
                                 tune_svm_c)
from hilbertune.landmarks import (NystroemMap, NystroemSVM, fit_nystroem, nystroem_features,
                                  nystroem_gram, select_landmarks)
from hilbertune.qasm import encoding_to_qasm3, kernel_circuit_to_qasm3
from hilbertune.pipeline import holm_adjust
from hilbertune.runs import execute_fit, predict_csv, reproduce_run
from hilbertune.selection import (Candidate, CandidateScore, Selection, SelectionSettings,
                                  learn_and_select, one_standard_error_choice)
from hilbertune.sweeps import plan_sweep, read_results, run_sweep, run_sweep_file

__version__ = "0.1.0"

__all__ = [
    # circuits and encodings
    "AngleRule", "Blueprint", "Step", "encode_states", "initial_params", "is_product",
    "product_factors", "resource_counts",
    "FAMILIES", "amplitude_state", "bit_flips", "build_encoding", "iqp_style",
    "reuploading_layers", "single_axis_rotations",
    # kernels
    "FrozenKernel", "fidelity_gram", "interference_zero_probability", "pauli_expectations",
    "product_gram", "projected_gram", "quantum_gram",
    # data
    "Dataset", "Preprocessing", "Split", "invented_demo", "load_bundled", "load_csv",
    "split_and_scale",
    # diagnostics and baselines
    "alignment_of", "compare_accuracies", "concentration", "corrected_resampled_t_test",
    "effective_dimension", "geometric_difference", "linear_svm", "mcnemar_exact",
    "repeated_split_scores", "spectrum", "tuned_rbf_svm", "classical_gram_health",
    "geometric_difference_curve", "holm_adjust",
    # hardware and export
    "clip_eigenvalues", "density_matrix_kernel", "depolarize_kernel",
    "inversion_test_depolarizing", "readout_kernel", "repair_gram", "restore_unit_diagonal",
    "shift_spectrum",
    "shot_budget", "shot_sampled_gram", "shot_variance", "density_matrix_expectations",
    "projected_entry_variance", "projected_shot_budget", "projected_shrink",
    "sample_expectations",
    "encoding_to_qasm3", "kernel_circuit_to_qasm3",
    # learning
    "EncodingClassifier", "OBJECTIVES", "centered_alignment", "kernel_alignment",
    "objective_loss", "ridge_kfold_loss", "ridge_loo_loss", "target_matrix",
    "SvmChoice", "TrainingResult", "TrainingSettings", "train_encoding", "tune_svm_c",
    # choosing the kernel
    "Candidate", "CandidateScore", "Selection", "SelectionSettings", "learn_and_select",
    "one_standard_error_choice",
    # scale
    "NystroemMap", "NystroemSVM", "fit_nystroem", "nystroem_features", "nystroem_gram",
    "select_landmarks",
    # runs and sweeps
    "resolve_config", "execute_fit", "predict_csv", "reproduce_run",
    "plan_sweep", "read_results", "run_sweep", "run_sweep_file",
    # errors
    "ArtifactError", "HilbertuneError", "InvalidInputError", "NotFittedError",
    "ResourceLimitError", "TrainingError",
    "__version__",
]
