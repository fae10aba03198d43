"""Test accuracy of the layered quantum kernel against qubits and bandwidth (breast cancer).

Data: scikit-learn's bundled Wisconsin breast-cancer set (``sklearn.datasets.
load_breast_cancer``, 569 rows, 30 features). For each of ``--splits`` stratified 70/30
splits (``hilbertune.data.split_and_scale``: standardize, PCA to n components, min-max to
[0, pi], all fitted on the training part only), and for each number of qubits n (= PCA
components) and bandwidth c:

* quantum kernel: layered encoding (n qubits, 2 layers, ring of CZ) at its initial
  parameters (weights 1, biases 0) with the features scaled by c; exact fidelity Gram;
  ``SVC(kernel="precomputed")`` with C chosen by 5-fold CV on the training part
  (``diagnostics.precomputed_svm``); no training, so the curve shows the bandwidth alone
  (Shaydulin & Wild, "Importance of kernel bandwidth in quantum machine learning",
  Phys. Rev. A 106, 042407 (2022));
* trained (unless ``--no-training``): the same encoding trained by centered kernel-target
  alignment (``training.train_encoding``, median-heuristic initial bandwidth), then the
  same SVM;
* classical baselines on the identical split and features: RBF SVM with C and gamma tuned
  by 5-fold CV (``diagnostics.tuned_rbf_svm``) and a CV-tuned linear SVM.

Mean and standard deviation over splits go to ``accuracy_vs_qubits.json``; the plots to
``accuracy_vs_qubits.png``. Usage: ``python experiments/accuracy_vs_qubits.py [--quick]``.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent


def mean_std(values) -> dict:
    values = np.asarray(values, float)
    return {"mean": float(values.mean()), "std": float(values.std()),
            "values": [float(v) for v in values]}


def run(qubits, bandwidths, n_splits, train_steps, seed0=0) -> dict:
    import jax
    from sklearn.datasets import load_breast_cancer

    from hilbertune import data, diagnostics
    from hilbertune.circuits import initial_params
    from hilbertune.encodings import build_encoding
    from hilbertune.kernels import quantum_gram
    from hilbertune.training import TrainingSettings, train_encoding

    bundle = load_breast_cancer()
    X, y = bundle.data, bundle.target
    quantum = {n: {c: [] for c in bandwidths} for n in qubits}
    mean_kernel = {n: {c: [] for c in bandwidths} for n in qubits}
    trained = {n: [] for n in qubits}
    trained_bandwidth = {n: [] for n in qubits}
    rbf = {n: [] for n in qubits}
    linear = {n: [] for n in qubits}
    for n in qubits:
        blueprint = build_encoding("layered", n, n_qubits=n, layers=2, entangler="ring")
        for split_seed in range(seed0, seed0 + n_splits):
            split = data.split_and_scale(X, y, test_fraction=0.3, seed=split_seed,
                                         n_components=n, reduce="pca")
            Xtr, Xte, ytr, yte = split.X_train, split.X_test, split.y_train, split.y_test
            for c in bandwidths:
                params = initial_params(blueprint, bandwidth=c)
                k_train = np.asarray(quantum_gram(blueprint, params, Xtr), np.float64)
                k_test = np.asarray(quantum_gram(blueprint, params, Xte, Xtr), np.float64)
                result = diagnostics.precomputed_svm(k_train, k_test, ytr, yte, seed=split_seed)
                quantum[n][c].append(result.test_accuracy)
                off = k_train[~np.eye(len(k_train), dtype=bool)]
                mean_kernel[n][c].append(float(off.mean()))
            if train_steps:
                fit = train_encoding(blueprint, Xtr, ytr,
                                     TrainingSettings(steps=train_steps, bias_scale=0.1),
                                     seed=split_seed)
                k_train = np.asarray(quantum_gram(blueprint, fit.params, Xtr), np.float64)
                k_test = np.asarray(quantum_gram(blueprint, fit.params, Xte, Xtr), np.float64)
                trained[n].append(diagnostics.precomputed_svm(
                    k_train, k_test, ytr, yte, seed=split_seed).test_accuracy)
                trained_bandwidth[n].append(float(math.exp(float(fit.params["log_bandwidth"]))))
            rbf[n].append(diagnostics.tuned_rbf_svm(Xtr, ytr, Xte, yte,
                                                    seed=split_seed).test_accuracy)
            linear[n].append(diagnostics.linear_svm(Xtr, ytr, Xte, yte,
                                                    seed=split_seed).test_accuracy)
            print(f"n={n} split={split_seed}: quantum "
                  + ", ".join(f"c={c:g}:{quantum[n][c][-1]:.3f}" for c in bandwidths)
                  + (f" | trained {trained[n][-1]:.3f}" if train_steps else "")
                  + f" | rbf {rbf[n][-1]:.3f} linear {linear[n][-1]:.3f}", flush=True)
        jax.clear_caches()  # one compiled program per qubit count is enough
    return {
        "quantum_untrained": {str(n): {str(c): mean_std(v) for c, v in d.items()}
                              for n, d in quantum.items()},
        "mean_offdiagonal_kernel": {str(n): {str(c): mean_std(v) for c, v in d.items()}
                                    for n, d in mean_kernel.items()},
        "quantum_trained": ({str(n): mean_std(v) for n, v in trained.items()}
                            if train_steps else {}),
        "trained_bandwidth": ({str(n): mean_std(v) for n, v in trained_bandwidth.items()}
                              if train_steps else {}),
        "rbf_svm": {str(n): mean_std(v) for n, v in rbf.items()},
        "linear_svm": {str(n): mean_std(v) for n, v in linear.items()},
    }


def plot(result: dict, qubits, bandwidths, path: Path) -> None:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(15, 4.4))
    FigureCanvasAgg(fig)
    ax1, ax2, ax3 = fig.subplots(1, 3)
    q = result["quantum_untrained"]
    for i, c in enumerate(bandwidths):
        means = [q[str(n)][str(c)]["mean"] for n in qubits]
        stds = [q[str(n)][str(c)]["std"] for n in qubits]
        ax1.errorbar(qubits, means, yerr=stds, marker="o", ms=4, capsize=2,
                     label=f"quantum, c = {c:g}", color=f"C{i}")
    if result["quantum_trained"]:
        t = result["quantum_trained"]
        ax1.errorbar(qubits, [t[str(n)]["mean"] for n in qubits],
                     yerr=[t[str(n)]["std"] for n in qubits], marker="D", ms=5, capsize=2,
                     color="C9", lw=2, label="quantum, trained (alignment)")
    for key, label, style in (("rbf_svm", "tuned RBF SVM", "k--"),
                              ("linear_svm", "linear SVM", "k:")):
        ax1.plot(qubits, [result[key][str(n)]["mean"] for n in qubits], style, lw=1.6,
                 label=label)
    ax1.set_xlabel("qubits n (= PCA components)")
    ax1.set_ylabel("test accuracy (mean over splits)")
    ax1.set_title("breast cancer: accuracy vs qubits")
    ax1.set_xticks(qubits)
    ax1.grid(alpha=0.3)
    ax1.legend(fontsize=7)

    for i, n in enumerate(qubits):
        ax2.errorbar(bandwidths, [q[str(n)][str(c)]["mean"] for c in bandwidths],
                     yerr=[q[str(n)][str(c)]["std"] for c in bandwidths], marker="o", ms=4,
                     capsize=2, color=f"C{i}", label=f"n = {n}")
    rbf_all = np.mean([result["rbf_svm"][str(n)]["mean"] for n in qubits])
    ax2.axhline(rbf_all, ls="--", color="k", lw=1.4,
                label=f"tuned RBF SVM (mean over n) {rbf_all:.3f}")
    ax2.set_xscale("log")
    ax2.set_xlabel("bandwidth c (features scaled by c before encoding)")
    ax2.set_ylabel("test accuracy (mean over splits)")
    ax2.set_title("accuracy vs bandwidth (untrained)")
    ax2.grid(alpha=0.3, which="both")
    ax2.legend(fontsize=7)

    m = result["mean_offdiagonal_kernel"]
    for i, n in enumerate(qubits):
        ax3.plot(bandwidths, [m[str(n)][str(c)]["mean"] for c in bandwidths], "o-", ms=4,
                 color=f"C{i}", label=f"n = {n}")
    ax3.set_xscale("log")
    ax3.set_yscale("log")
    ax3.set_xlabel("bandwidth c")
    ax3.set_ylabel("mean off-diagonal kernel value")
    ax3.set_title("kernel concentration (train Gram)")
    ax3.grid(alpha=0.3, which="both")
    ax3.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=110)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer qubits, bandwidths, splits")
    parser.add_argument("--no-training", action="store_true", help="skip the trained curve")
    parser.add_argument("--out", type=Path, default=ROOT / "results")
    args = parser.parse_args(argv)
    if args.quick:
        qubits, bandwidths, n_splits, steps = [2, 4, 6], [0.1, 0.5, 2.0], 2, 20
    else:
        qubits, bandwidths, n_splits, steps = ([2, 3, 4, 6, 8],
                                               [0.05, 0.1, 0.2, 0.5, 1.0, 2.0], 3, 40)
    if args.no_training:
        steps = 0
    args.out.mkdir(parents=True, exist_ok=True)
    started = time.perf_counter()
    load_start = list(os.getloadavg())
    result = run(qubits, bandwidths, n_splits, steps)
    import jax
    import sklearn

    result["meta"] = {
        "dataset": "sklearn.datasets.load_breast_cancer (569 rows, 30 features, 2 classes)",
        "split": "stratified 70/30, seeds 0..splits-1; standardize + PCA(n) + min-max to "
                 "[0, pi] fitted on the training part",
        "encoding": "layered, n qubits = n features, 2 layers, ring of CZ, initial weights",
        "svm": "SVC(kernel='precomputed'), C by 5-fold CV on the training part",
        "training": (f"{steps} steps of centered alignment (adam, lr 0.05), median-heuristic "
                     "initial bandwidth" if steps else "none"),
        "qubits": qubits, "bandwidths": bandwidths, "splits": n_splits, "quick": args.quick,
        "wall_seconds": round(time.perf_counter() - started, 1),
        "load_average_start": [round(v, 2) for v in load_start],
        "load_average_end": [round(v, 2) for v in os.getloadavg()],
        "machine": f"{platform.system()} {platform.machine()}",
        "jax": jax.__version__, "scikit-learn": sklearn.__version__,
        "note": "exact classical simulation; says nothing about hardware",
    }
    (args.out / "accuracy_vs_qubits.json").write_text(json.dumps(result, indent=2) + "\n")
    plot(result, qubits, bandwidths, args.out / "accuracy_vs_qubits.png")
    print(f"wrote {args.out / 'accuracy_vs_qubits.json'} and "
          f"{args.out / 'accuracy_vs_qubits.png'} in {result['meta']['wall_seconds']} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
