"""Scaling study of the exact fidelity Gram (layered encoding) and of the Nystroem path.

Measures, with ``hilbertune.quantum_gram`` on the layered encoding (2 layers, ring of CZ,
4 features cycled over the qubits):

1. Gram time against the number of samples N at fixed qubits n (the N^2 regime: one
   [N, 2**n] x [2**n, N] complex product dominates once N is large);
2. Gram time against n at fixed N (the 2**n regime: states and the product both grow as
   2**n);
3. exact Gram against the Nystroem features (m landmarks, ``hilbertune.landmarks``) at the
   same N, to show the N*m path.

Every time is the median over ``--repeats`` calls after one untimed warm-up call that pays
for XLA compilation (reported separately). It also derives, from the memory formulas

    exact:    N * 2**n * 8 bytes (complex64 states) + N**2 * 4 bytes (float32 Gram)
    Nystroem: (m + B) * 2**n * 8 (landmark states + one block of B rows) + N * m * 8
              (float64 features)

the largest N and n that fit a 24 GiB machine, and writes them to
``experiments/results/scaling.md`` (linked from the README), with the measured curves in
``scaling.json`` and the plots ``scaling_vs_samples.png`` / ``scaling_vs_qubits.png``.

Usage: ``python experiments/scaling_study.py [--quick] [--repeats R] [--out DIR]``.
The machine is shared and its load changes the times; the load average at start and end
is recorded next to the figures.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import statistics
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent
GIB = 2**30
MACHINE_BYTES = 24 * GIB
STATE_BYTES = 8       # complex64 amplitude
GRAM_BYTES = 4        # float32 Gram entry
FEATURE_BYTES = 8     # float64 Nystroem feature
BLOCK_ROWS = 2048     # rows per kernel call on the Nystroem path (landmarks.nystroem_features)


def exact_bytes(n_samples: int, n_qubits: int) -> int:
    """States + Gram of the exact path: N * 2**n * 8 + N**2 * 4."""
    return n_samples * 2**n_qubits * STATE_BYTES + n_samples**2 * GRAM_BYTES


def nystroem_bytes(n_samples: int, n_qubits: int, n_landmarks: int,
                   block_rows: int = BLOCK_ROWS) -> int:
    """Landmark states + one block of states + the N x m features."""
    return ((n_landmarks + min(block_rows, n_samples)) * 2**n_qubits * STATE_BYTES
            + n_samples * n_landmarks * FEATURE_BYTES)


def largest(fits, start: int = 1) -> int:
    """Largest integer k >= start with fits(k) (fits is monotone: True then False)."""
    if not fits(start):
        return 0
    hi = start
    while fits(hi * 2):
        hi *= 2
        if hi > 10**15:
            return hi
    lo, hi = hi, hi * 2  # fits(lo), not fits(hi)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        lo, hi = (mid, hi) if fits(mid) else (lo, mid)
    return lo


def median_time(fn, repeats: int) -> tuple:
    """(compile + first run seconds, median of ``repeats`` warm runs)."""
    start = time.perf_counter()
    fn()
    first = time.perf_counter() - start
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return first, statistics.median(times)


def slope(xs, ys) -> float:
    """Least-squares slope of ys against xs."""
    return float(np.polyfit(np.asarray(xs, float), np.asarray(ys, float), 1)[0])


def load_average() -> list:
    try:
        return [round(v, 2) for v in os.getloadavg()]
    except OSError:
        return []


def run(quick: bool, repeats: int, out_dir: Path, seed: int) -> dict:
    import jax

    from hilbertune.circuits import initial_params
    from hilbertune.encodings import build_encoding
    from hilbertune.kernels import FrozenKernel, quantum_gram
    from hilbertune.landmarks import fit_nystroem, nystroem_features

    rng = np.random.default_rng(seed)
    n_features = 4
    budget = "16GiB"

    def gram_timer(n_qubits, X):
        blueprint = build_encoding("layered", n_features, n_qubits=n_qubits, layers=2)
        params = initial_params(blueprint, jax.random.key(seed), bandwidth=1.0, bias_scale=0.1)
        return lambda: jax.block_until_ready(quantum_gram(blueprint, params, X,
                                                         memory_budget=budget))

    fixed_n = 10
    sizes = [100, 200, 400, 800] if quick else [250, 500, 1000, 2000, 4000]
    by_samples = []
    for N in sizes:
        X = rng.uniform(0, math.pi, size=(N, n_features))
        first, median = median_time(gram_timer(fixed_n, X), repeats)
        by_samples.append({"n_samples": N, "n_qubits": fixed_n, "seconds": median,
                           "first_call_seconds": first})
        print(f"N={N:5d} n={fixed_n}: {median:.4f} s (first call {first:.2f} s)", flush=True)

    fixed_N = 200
    qubit_counts = [2, 4, 6, 8, 10, 12] if quick else [2, 4, 6, 8, 10, 12, 14, 16, 18]
    by_qubits = []
    X = rng.uniform(0, math.pi, size=(fixed_N, n_features))
    for n in qubit_counts:
        first, median = median_time(gram_timer(n, X), repeats)
        by_qubits.append({"n_samples": fixed_N, "n_qubits": n, "seconds": median,
                          "first_call_seconds": first})
        print(f"N={fixed_N} n={n:2d}: {median:.4f} s (first call {first:.2f} s)", flush=True)

    # exact against Nystroem at the same N (train Gram vs train features)
    landmarks = 100 if quick else 200
    nys_sizes = [400, 800] if quick else [1000, 2000, 4000]
    blueprint = build_encoding("layered", n_features, n_qubits=fixed_n, layers=2)
    kernel = FrozenKernel(blueprint, initial_params(blueprint, jax.random.key(seed),
                                                    bandwidth=1.0, bias_scale=0.1),
                          memory_budget=budget)
    nystroem = []
    for N in nys_sizes:
        X = rng.uniform(0, math.pi, size=(N, n_features))

        def nys():
            nmap = fit_nystroem(kernel, X, landmarks, seed=seed)
            return nystroem_features(kernel, X, nmap)

        first, median = median_time(nys, repeats)
        exact = next((r["seconds"] for r in by_samples if r["n_samples"] == N), None)
        if exact is None:
            exact = median_time(gram_timer(fixed_n, X), repeats)[1]
        K = np.asarray(kernel(X))
        features = nys()
        error = float(np.linalg.norm(K - features @ features.T) / np.linalg.norm(K))
        nystroem.append({"n_samples": N, "n_qubits": fixed_n, "n_landmarks": landmarks,
                         "seconds": median, "first_call_seconds": first,
                         "exact_seconds": exact, "relative_frobenius_error": error})
        print(f"Nystroem N={N} m={landmarks}: {median:.4f} s vs exact {exact:.4f} s, "
              f"relative error {error:.3g}", flush=True)

    top = by_samples[-3:]
    top_q = by_qubits[-3:]
    fits = {
        "samples_exponent": slope([math.log(r["n_samples"]) for r in top],
                                  [math.log(r["seconds"]) for r in top]),
        "qubits_doubling_per_qubit": slope([r["n_qubits"] for r in top_q],
                                           [math.log2(r["seconds"]) for r in top_q]),
        "fitted_on": "the three largest sizes of each sweep",
    }
    return {"by_samples": by_samples, "by_qubits": by_qubits, "nystroem": nystroem,
            "fits": fits, "limits": memory_limits(by_samples, fits)}


def memory_limits(by_samples, fits) -> dict:
    exact_n = {n: largest(lambda N, n=n: exact_bytes(N, n) <= MACHINE_BYTES)
               for n in (4, 8, 10, 12, 16, 20, 24, 28)}
    exact_q = {N: largest(lambda q, N=N: exact_bytes(N, q) <= MACHINE_BYTES)
               for N in (100, 1000, 10_000, 100_000)}
    nys_n = {f"{n}q_m{m}": largest(lambda N, n=n, m=m: nystroem_bytes(N, n, m) <= MACHINE_BYTES)
             for n in (10, 16, 20) for m in (200, 1000)}
    nys_q = {f"N{N}_m{m}": largest(lambda q, N=N, m=m: nystroem_bytes(N, q, m) <= MACHINE_BYTES)
             for N in (10_000, 1_000_000) for m in (200, 1000)}
    # time extrapolated from the largest measured N with the fitted exponent (n = 10)
    ref = by_samples[-1]
    k = fits["samples_exponent"]
    extrapolated = {str(N): ref["seconds"] * (N / ref["n_samples"]) ** k
                    for N in (exact_n[10],)}
    return {"machine_bytes": MACHINE_BYTES, "exact_largest_samples": exact_n,
            "exact_largest_qubits": exact_q, "nystroem_largest_samples": nys_n,
            "nystroem_largest_qubits": nys_q,
            "exact_seconds_extrapolated_at_10_qubits": extrapolated}


def plot(result: dict, out_dir: Path) -> list:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    written = []
    s = result["by_samples"]
    fig = Figure(figsize=(5.6, 4))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    Ns = np.array([r["n_samples"] for r in s], float)
    ts = np.array([r["seconds"] for r in s])
    ax.loglog(Ns, ts, "o-", label=f"exact Gram, n = {s[0]['n_qubits']}")
    ax.loglog(Ns, ts[-1] * (Ns / Ns[-1]) ** 2, ":", color="0.5", label="slope 2 (N^2)")
    ax.loglog(Ns, ts[-1] * (Ns / Ns[-1]), "--", color="0.7", label="slope 1 (N)")
    nys = result["nystroem"]
    if nys:
        ax.loglog([r["n_samples"] for r in nys], [r["seconds"] for r in nys], "s-",
                  label=f"Nystroem features, m = {nys[0]['n_landmarks']}")
    from matplotlib.ticker import NullFormatter

    ticks = sorted({int(N) for N in Ns} | {r["n_samples"] for r in nys})
    ax.set_xticks(ticks, [str(t) for t in ticks])
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xlabel("samples N")
    ax.set_ylabel("seconds (median)")
    ax.set_title(f"Gram time vs N (fitted exponent {result['fits']['samples_exponent']:.2f})")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8)
    path = out_dir / "scaling_vs_samples.png"
    fig.savefig(path, dpi=120, bbox_inches="tight")
    written.append(path)

    q = result["by_qubits"]
    fig = Figure(figsize=(5.6, 4))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ns = np.array([r["n_qubits"] for r in q], float)
    tq = np.array([r["seconds"] for r in q])
    ax.semilogy(ns, tq, "o-", label=f"exact Gram, N = {q[0]['n_samples']}")
    ax.semilogy(ns, tq[-1] * 2.0 ** (ns - ns[-1]), ":", color="0.5", label="2^n")
    ax.set_xlabel("qubits n")
    ax.set_ylabel("seconds (median)")
    ax.set_title("Gram time vs n (fitted: x%.2f per qubit)"
                 % 2 ** result["fits"]["qubits_doubling_per_qubit"])
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8)
    path = out_dir / "scaling_vs_qubits.png"
    fig.savefig(path, dpi=120, bbox_inches="tight")
    written.append(path)
    return written


def duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def markdown(result: dict, meta: dict) -> str:
    lim = result["limits"]
    fits = result["fits"]
    lines = [
        "# Scaling of the exact fidelity Gram and of the Nystroem path",
        "",
        f"Written by `experiments/scaling_study.py{' --quick' if meta['quick'] else ''}` on "
        f"{meta['machine']} ({meta['cpus']} CPUs, jax {meta['jax']}); load average "
        f"{meta['load_start']} at start, {meta['load_end']} at end (a shared machine: "
        "absolute times vary with its load, the exponents much less).",
        "",
        "## Measured (layered encoding, 2 layers, ring of CZ; median of "
        f"{meta['repeats']} warm calls)",
        "",
        "| N | n | exact Gram seconds | first call (compile) seconds |",
        "|---:|---:|---:|---:|",
    ]
    for r in result["by_samples"] + result["by_qubits"]:
        lines.append(f"| {r['n_samples']} | {r['n_qubits']} | {r['seconds']:.4f} | "
                     f"{r['first_call_seconds']:.2f} |")
    lines += [
        "",
        f"* Time against N (n = {result['by_samples'][0]['n_qubits']}): fitted exponent "
        f"**{fits['samples_exponent']:.2f}** on the three largest N (2 = the N^2 matrix "
        "product dominates; below 2 the O(N 2^n) state preparation still matters).",
        f"* Time against n (N = {result['by_qubits'][0]['n_samples']}): **x"
        f"{2 ** fits['qubits_doubling_per_qubit']:.2f} per added qubit** on the three largest "
        "n (x2 = the 2^n regime).",
        "",
        "| N | m landmarks | Nystroem seconds | exact seconds | relative Frobenius error |",
        "|---:|---:|---:|---:|---:|",
    ]
    for r in result["nystroem"]:
        lines.append(f"| {r['n_samples']} | {r['n_landmarks']} | {r['seconds']:.4f} | "
                     f"{r['exact_seconds']:.4f} | {r['relative_frobenius_error']:.3g} |")
    lines += [
        "",
        "## What fits a 24 GiB machine (from the memory formulas, not measured)",
        "",
        "Exact path: `N * 2^n * 8` bytes of complex64 states + `N^2 * 4` bytes of float32 "
        "Gram. Nystroem path (m landmarks, kernel rows computed in blocks of "
        f"B = {BLOCK_ROWS}): `(m + B) * 2^n * 8` bytes of states + `N * m * 8` bytes of "
        "float64 features: memory grows as N*m instead of N^2, and only m + B states exist "
        "at any time. Leave head room: XLA makes temporary copies, and hilbertune's default "
        "memory budget is half the RAM (at most 8 GiB); raise `compute.memory_budget` to "
        "approach these limits.",
        "",
        "| qubits n | largest N, exact |",
        "|---:|---:|",
    ]
    for n, N in lim["exact_largest_samples"].items():
        lines.append(f"| {n} | {int(N):,} |")
    lines += ["", "| samples N | largest n, exact |", "|---:|---:|"]
    for N, q in lim["exact_largest_qubits"].items():
        N = int(N)
        shown = q if q else f"none: the Gram alone needs {N**2 * GRAM_BYTES / GIB:.0f} GiB"
        lines.append(f"| {N:,} | {shown} |")
    lines += ["", "| qubits n, landmarks m | largest N, Nystroem |", "|---|---:|"]
    for key, N in lim["nystroem_largest_samples"].items():
        n, m = key.split("_")
        lines.append(f"| n = {n[:-1]}, m = {m[1:]} | {N:,} |")
    lines += ["", "| samples N, landmarks m | largest n, Nystroem |", "|---|---:|"]
    for key, q in lim["nystroem_largest_qubits"].items():
        N, m = key.split("_")
        lines.append(f"| N = {int(N[1:]):,}, m = {m[1:]} | {q} |")
    lines += ["", "The Nystroem reach in n is set by the block of states, (m + B) * 2^n * 8 "
              "bytes: smaller blocks (`nystroem_features(..., block_rows=...)`) buy about one "
              "qubit per halving of m + B."]
    ext = lim["exact_seconds_extrapolated_at_10_qubits"]
    ref = result["by_samples"][-1]
    for N, seconds in ext.items():
        quadratic = ref["seconds"] * (int(N) / ref["n_samples"]) ** 2
        lines += ["", f"At n = 10 the exact path is memory-bound at N = {int(N):,}: the Gram "
                  f"alone is {int(N)**2 * GRAM_BYTES / GIB:.1f} GiB. From the largest measured "
                  f"N = {ref['n_samples']} ({ref['seconds']:.3g} s) it would take about "
                  f"{duration(seconds)} with the measured exponent and {duration(quadratic)} "
                  "with exponent 2 (the matrix product's; more likely at that size) on this "
                  "machine: extrapolated, not measured."]
    lines += ["", "Plots: [time vs N](scaling_vs_samples.png), "
              "[time vs n](scaling_vs_qubits.png); raw numbers: [scaling.json](scaling.json).",
              ""]
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes (a minute or two)")
    parser.add_argument("--repeats", type=int, default=None,
                        help="timed calls per size (default 3, quick 2)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", type=Path, default=ROOT / "results")
    parser.add_argument("--replot", action="store_true",
                        help="redraw plots and scaling.md from an existing scaling.json")
    args = parser.parse_args(argv)
    if args.replot:
        result = json.loads((args.out / "scaling.json").read_text())
        plot(result, args.out)
        (args.out / "scaling.md").write_text(markdown(result, result["meta"]))
        return 0
    repeats = args.repeats or (2 if args.quick else 3)
    args.out.mkdir(parents=True, exist_ok=True)
    import jax

    meta = {"quick": args.quick, "repeats": repeats, "seed": args.seed,
            "machine": f"{platform.system()} {platform.machine()}",
            "cpus": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
            else os.cpu_count(), "jax": jax.__version__, "python": sys.version.split()[0],
            "load_start": load_average()}
    started = time.perf_counter()
    result = run(args.quick, repeats, args.out, args.seed)
    meta["load_end"] = load_average()
    meta["wall_seconds"] = round(time.perf_counter() - started, 1)
    result["meta"] = meta
    (args.out / "scaling.json").write_text(json.dumps(result, indent=2) + "\n")
    written = plot(result, args.out)
    (args.out / "scaling.md").write_text(markdown(result, meta))
    for path in [args.out / "scaling.json", args.out / "scaling.md", *written]:
        print(f"wrote {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
