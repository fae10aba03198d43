"""A run from configuration to run directory: the whole job, as one function.

``execute_fit`` walks the data flow (load -> split/scale on the train part -> encoding ->
training -> frozen kernel + SVM -> baselines, significance, diagnostics, hardware estimate
-> artifacts -> report) and writes every artifact atomically. ``predict_csv``,
``reproduce_run`` and ``export_circuit`` read finished run directories (hashes checked).
"""

from __future__ import annotations

import functools
import math
import os
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

from hilbertune import artifacts
from hilbertune.errors import ArtifactError, HilbertuneError, InvalidInputError

ARTIFACTS = ("config.toml", "params.npz", "kernels.npz", "history.csv", "summary.json",
             "report.html", "circuit.qasm")
# No wall-clock column: history.csv is byte-identical between two runs of the same config,
# seed and machine (`hilbertune reproduce`, manifest hashes); the training time goes to
# summary.json as training.wall_time_s instead.
HISTORY_COLUMNS = ("step", "objective", "alignment", "validation_objective", "grad_norm",
                   "learning_rate")
SIMULATION_CAUTION = ("All quantum kernels here were simulated exactly on a classical computer; "
                      "a simulated kernel is no evidence about quantum hardware.")


# --------------------------------------------------------------------------- building blocks

def load_dataset(config: dict):
    """The dataset named by ``config['data']``."""
    from hilbertune import data

    spec = config["data"]
    source = spec["source"]
    if source == "demo":
        return data.invented_demo(n_samples=spec["samples"], seed=config["seed"])
    if source == "csv":
        return data.load_csv(spec["path"], spec["target"], drop_missing=spec["drop_missing"])
    return data.load_bundled(source, n_samples=spec["samples"], seed=config["seed"])


def feature_count(config: dict, n_columns: int) -> int:
    """Features the encoding takes after reduction."""
    wanted = config["data"]["features"]
    if wanted:
        if wanted > n_columns:
            raise InvalidInputError(f"data.features = {wanted} but the data have only "
                                    f"{n_columns} feature columns; lower data.features")
        return wanted
    enc = config["encoding"]
    if enc["family"] == "amplitude":
        return n_columns
    return min(n_columns, enc["qubits"])


def check_qubit_request(config: dict) -> None:
    """Refuse a qubit count that the encoding family would not use.

    Call only when the user asked for ``encoding.qubits`` explicitly: the angle, iqp and
    basis families use one qubit per feature, the amplitude family ceil(log2(features))
    per copy; only the layered family takes any count.
    """
    enc = config["encoding"]
    family, wanted = enc["family"], enc["qubits"]
    if family == "layered":
        return
    n_columns = load_dataset(config).X.shape[1]
    used = build_blueprint(config, feature_count(config, n_columns)).n_qubits
    if used == wanted:
        return
    fixed = (f"data.features = {config['data']['features']} fixes it"
             if config["data"]["features"] else None)
    if family == "amplitude":
        rule = (f"the amplitude encoding uses ceil(log2(features)) x copies = {used} qubit(s) "
                f"for these data ({fixed or 'change data.features or encoding.copies to change it'})")
        fix = f"drop --qubits or set it to {used}"
    else:
        limit = config["data"]["features"] or n_columns
        rule = (f"the {family} encoding uses one qubit per feature and the data have {limit} "
                f"feature(s){' (' + fixed + ')' if fixed else ''}, so it allows at most {limit} "
                "qubit(s)")
        fix = f"pass --qubits {used} or fewer, or use encoding.family = 'layered' (any count)"
    raise InvalidInputError(f"encoding.qubits = {wanted} conflicts with the data: {rule}; {fix}")


def check_output_path(out, *, run_dir, inputs=(), overwrite: bool = False) -> None:
    """Refuse an output file that is an artifact of a run or (without ``overwrite``) one of
    the command's input files; symlinks and hard links are seen through."""
    out = Path(out)
    if out.is_dir():
        raise InvalidInputError(f"--out {str(out)!r} is a folder; pass a file name such as "
                                f"{str(out / 'out.txt')!r}")
    real = out.resolve()
    if real.exists() and not real.is_file():
        # an atomic write renames over the path: it would replace a device or a pipe
        raise InvalidInputError(f"--out {str(out)!r} is not a regular file (a device, pipe or "
                                "socket); pass a file name, or leave out --out to print")
    folder = real.parent
    if (folder / artifacts.MANIFEST).is_file() or (folder / "checkpoints").is_dir():
        names = set(ARTIFACTS) | {artifacts.MANIFEST}
        try:
            listed = artifacts.read_json(folder / artifacts.MANIFEST).get("artifacts", {})
            names |= set(listed) if isinstance(listed, dict) else set()
        except (ArtifactError, AttributeError):
            pass
        if real.name in names:
            raise InvalidInputError(f"--out {str(out)!r} is {real.name}, an artifact of the run "
                                    f"in {str(folder)!r}; writing it would destroy the run: "
                                    "choose another file name")
    if out.exists():
        run_dir = Path(run_dir)
        for name in ARTIFACTS + (artifacts.MANIFEST,):
            if (run_dir / name).is_file() and os.path.samefile(out, run_dir / name):
                raise InvalidInputError(f"--out {str(out)!r} is the same file as {name} of the "
                                        f"run {str(run_dir)!r}; choose another file name")
        for given in inputs:
            if Path(given).is_file() and os.path.samefile(out, given) and not overwrite:
                raise InvalidInputError(f"--out {str(out)!r} is the input file {str(given)!r}; "
                                        "choose another file name (or pass --overwrite to "
                                        "replace the input with the output)")


def build_blueprint(config: dict, n_features: int):
    """The encoding circuit a config describes (deterministic; no randomness)."""
    from hilbertune.encodings import build_encoding

    enc = config["encoding"]
    family = enc["family"]
    options = {
        "angle": {"axis": enc["axis"]},
        "iqp": {"layers": enc["layers"], "pairs": enc["entangler"],
                "weight_sharing": enc["weight_sharing"]},
        "layered": {"n_qubits": enc["qubits"], "layers": enc["layers"],
                    "entangler": enc["entangler"], "entangler_gate": enc["entangler_gate"],
                    "axes": tuple(enc["axes"]), "weight_sharing": enc["weight_sharing"]},
        "amplitude": {"copies": enc["copies"]},
        "basis": {},
    }[family]
    return build_encoding(family, n_features, **options)


def kernel_pair(config: dict, blueprint, params, X_train, X_test, *,
                progress: bool = False):
    """(train Gram, test-vs-train Gram) as float64 numpy arrays."""
    if progress:
        from rich.console import Console

        with Console(stderr=True).status(f"computing {config['encoding']['kind']} Grams "
                                         f"({len(X_train)} x {len(X_train)} and "
                                         f"{len(X_test)} x {len(X_train)})"):
            return kernel_pair(config, blueprint, params, X_train, X_test)
    from hilbertune.kernels import projected_gram, quantum_gram

    enc, compute = config["encoding"], config["compute"]
    if enc["kind"] == "projected":
        k_train = projected_gram(blueprint, params, X_train, gamma=enc["gamma"])
        k_test = projected_gram(blueprint, params, X_test, X_train, gamma=enc["gamma"])
    else:
        options = {"memory_budget": compute["memory_budget"],
                   "chunk_size": compute["chunk_size"] or None}
        k_train = quantum_gram(blueprint, params, X_train, **options)
        k_test = quantum_gram(blueprint, params, X_test, X_train, **options)
    return np.asarray(k_train, np.float64), np.asarray(k_test, np.float64)


def _prepare_out_dir(out_dir: Path, overwrite: bool, config_text: str) -> None:
    if out_dir.exists() and not out_dir.is_dir():
        raise InvalidInputError(f"--out {str(out_dir)!r} is a file; choose a directory path")
    if out_dir.is_dir() and any(out_dir.iterdir()):
        finished = (out_dir / artifacts.MANIFEST).exists()
        saved = out_dir / "config.toml"
        # an interrupted run of ours: checkpoints, or killed before the first checkpoint
        # (then only its config.toml, identical to this one, is there)
        interrupted = not finished and ((out_dir / "checkpoints").is_dir() or (
            saved.is_file() and saved.read_bytes() == config_text.encode("utf-8")))
        if not overwrite and not interrupted:
            raise InvalidInputError(f"output directory {str(out_dir)!r} already exists and is not "
                                    "empty; choose another --out or pass --overwrite (your other "
                                    "files there are kept)")
        if finished:
            # unmark the old run first: a crash while overwriting then leaves an interrupted
            # run (resumable), not a manifest that disagrees with half-replaced artifacts
            (out_dir / artifacts.MANIFEST).unlink()
        _remove_stale_temporaries(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)


def _remove_stale_temporaries(out_dir: Path) -> None:
    """Delete temporary files that a killed process left (atomic writes never finished)."""
    names = ARTIFACTS + (artifacts.MANIFEST,)
    for path in out_dir.glob(".*.tmp"):  # artifacts.write_bytes: .<name>.<random>.tmp
        if any(path.name.startswith(f".{name}.") for name in names) and path.is_file():
            path.unlink()
    for path in (out_dir / "checkpoints").glob(".checkpoint.*.tmp"):  # checkpoint writes
        if path.is_file():
            path.unlink()


def _check_resume_config(out_dir: Path, config_text: str, overwrite: bool) -> None:
    saved = out_dir / "config.toml"
    if saved.exists() and saved.read_text(encoding="utf-8") != config_text:
        if (out_dir / "checkpoints").is_dir() and not overwrite:
            raise InvalidInputError(f"{str(out_dir)!r} holds an interrupted run with a different "
                                    "configuration; resume it with the same settings or choose "
                                    "another --out")
        if (out_dir / "checkpoints").is_dir():
            shutil.rmtree(out_dir / "checkpoints")  # our own checkpoints of another config


def _boundary(config, blueprint, params, model, X_train, k_kind):
    """Decision values on a grid over the training range, for 2-D data only."""
    from hilbertune.kernels import projected_gram, quantum_gram

    lo, hi = X_train.min(axis=0), X_train.max(axis=0)
    pad = 0.1 * (hi - lo + 1e-9)
    xs = np.linspace(lo[0] - pad[0], hi[0] + pad[0], 40)
    ys = np.linspace(lo[1] - pad[1], hi[1] + pad[1], 40)
    grid = np.stack(np.meshgrid(xs, ys), axis=-1).reshape(-1, 2)
    if k_kind == "projected":
        gram = projected_gram(blueprint, params, grid, X_train, gamma=config["encoding"]["gamma"])
    else:
        gram = quantum_gram(blueprint, params, grid, X_train,
                            memory_budget=config["compute"]["memory_budget"])
    pred = model.predict(np.asarray(gram, np.float64))
    classes = list(model.classes_)
    return xs, ys, np.array([classes.index(p) for p in pred], float).reshape(40, 40)


# --------------------------------------------------------------------------- the whole job

def check_inputs(config: dict):
    """Load the data and build the encoding; every input error surfaces here, before any
    file is written (also used to check every trial of a sweep up front).

    Returns:
      (dataset, n_features, blueprint, split).

    Raises:
      InvalidInputError for bad data or settings; ResourceLimitError (with the estimate)
      when the statevectors of all samples would not fit in ``compute.memory_budget``.
    """
    from hilbertune import data
    from hilbertune.circuits import is_product, require_state_memory
    from hilbertune.kernels import resolve_memory_budget

    dataset = load_dataset(config)
    n_features = feature_count(config, dataset.X.shape[1])
    blueprint = build_blueprint(config, n_features)
    split = data.split_and_scale(dataset.X, np.asarray(dataset.y),
                                 test_fraction=config["data"]["test_fraction"],
                                 seed=config["seed"], n_components=n_features,
                                 reduce=config["data"]["reduce"])
    if not is_product(blueprint):  # product encodings never form statevectors
        require_state_memory(len(split.X_train) + len(split.X_test), blueprint,
                             resolve_memory_budget(config["compute"]["memory_budget"]))
    return dataset, n_features, blueprint, split


def execute_fit(config: dict, out_dir, *, overwrite: bool = False, progress: bool = False) -> dict:
    """Run the whole job for a resolved config and write a run directory.

    Args:
      config: from ``config.resolve_config`` (every default filled in).
      out_dir: run directory; refused if it exists and is not empty, unless ``overwrite``
        (then only our artifacts are replaced) or it holds an interrupted run of the same
        config (then training resumes from its last checkpoint).

    One writer at a time: the directory is locked for the whole fit, and a second writer
    is refused (exit 2). A fit that replaces a finished run (or writes among other files)
    is built in a sibling directory and swapped in only when complete, so the old run
    survives any failure; a killed replacement resumes from its checkpoints when the same
    command is run again.

    Returns:
      the summary dict (also written to ``summary.json``).
    """
    from hilbertune import config as cfg
    from hilbertune import rundir

    out_dir = Path(out_dir)
    cfg.check_consistency(config)
    config_text = cfg.dump_toml(config)
    with rundir.exclusive(out_dir) as target:
        rundir.recover(target)
        build = _prepare_build(out_dir, target, overwrite, config_text)
        in_place = build == target
        fresh = not build.exists()
        _drop_damaged_checkpoint(build)
        try:
            summary = _execute_fit(config, out_dir if in_place else build,
                                   overwrite=overwrite or not in_place, progress=progress)
        except HilbertuneError:
            # a failed fit leaves nothing partial behind in a directory it created itself (an
            # interrupted one, Ctrl-C or a kill, keeps its checkpoints to resume from)
            if (fresh or not in_place) and build.is_dir():
                shutil.rmtree(build, ignore_errors=True)
            raise
        data_path = _resolved_data_path(config)
        if data_path is not None:
            artifacts.update_manifest(build, data_path=data_path)
        if not in_place:
            rundir.swap_in(build, target, replaced=set(ARTIFACTS) | {
                artifacts.MANIFEST, "checkpoints"})
    return summary


def _prepare_build(out_dir: Path, target: Path, overwrite: bool, config_text: str) -> Path:
    """Where this fit writes: ``target`` itself when it is new, empty or an interrupted run
    (resume); else (``overwrite`` required) the sibling build directory."""
    from hilbertune import rundir

    if target.exists() and not target.is_dir():
        raise InvalidInputError(f"--out {str(out_dir)!r} is a file; choose a directory path")
    if not target.is_dir() or not any(target.iterdir()):
        return target
    finished = (target / artifacts.MANIFEST).exists()
    saved = target / "config.toml"
    interrupted = not finished and ((target / "checkpoints").is_dir() or (
        saved.is_file() and saved.read_bytes() == config_text.encode("utf-8")))
    if interrupted:
        return target  # resumes (or, another config, is refused or replaced in the fit)
    if not overwrite:
        raise InvalidInputError(f"output directory {str(out_dir)!r} already exists and is not "
                                "empty; choose another --out or pass --overwrite (your other "
                                "files there are kept)")
    build = rundir.build_path(target)
    if build.exists():
        saved = build / "config.toml"
        # a build a kill cut short resumes only with the same config; a complete one whose
        # swap was cut short is older than this request: start again
        if (build / artifacts.MANIFEST).exists() or not build.is_dir() or not (
                saved.is_file() and saved.read_bytes() == config_text.encode("utf-8")):
            if build.is_dir():
                shutil.rmtree(build)
            else:
                build.unlink()
    return build


def _drop_damaged_checkpoint(run_dir: Path) -> None:
    """A damaged checkpoint is reported and set aside: training restarts from step 0."""
    import sys

    from hilbertune.training import checkpoint_problem

    checkpoints = run_dir / "checkpoints"
    if not checkpoints.is_dir():
        return
    # one folder per training run of the main split (checkpoints/<scope>-<objective>)
    for folder in [checkpoints] + sorted(p for p in checkpoints.iterdir() if p.is_dir()):
        problem = checkpoint_problem(folder)
        if problem:
            print(f"hilbertune: note: {problem}; training restarts from step 0",
                  file=sys.stderr)
            shutil.rmtree(folder)
            if folder == checkpoints:
                return


def _resolved_data_path(config: dict):
    """The absolute path of a CSV source (symlinks resolved), or None for other sources."""
    if config["data"]["source"] != "csv":
        return None
    return str(Path(config["data"]["path"]).resolve())


def _execute_fit(config: dict, out_dir: Path, *, overwrite: bool, progress: bool) -> dict:
    from hilbertune import config as cfg
    from hilbertune import pipeline

    started = time.perf_counter()
    cfg.check_consistency(config)
    config_text = cfg.dump_toml(config)
    out_dir = Path(out_dir)
    enable_compile_cache(config["compute"]["compile_cache"])
    from hilbertune.kernels import select_device

    select_device(config["compute"]["device"])  # before any array is made

    stage = time.perf_counter()
    dataset, n_features, blueprint, split = check_inputs(config)
    settings = pipeline.settings_from_config(config, n_features)
    pipeline.check_selection(settings, split.y_train)
    timings = {"load_and_split": time.perf_counter() - stage}

    _prepare_out_dir(out_dir, overwrite, config_text)
    _check_resume_config(out_dir, config_text, overwrite)
    artifacts.write_text(out_dir / "config.toml", config_text)

    # ---- every split (the main one first): learn + select on its training part, evaluate,
    # classical baselines; the same code for each
    stage = time.perf_counter()
    run = functools.partial(pipeline.all_parts, dataset, blueprint, settings, main_split=split,
                            checkpoint_dir=str(out_dir / "checkpoints"), progress=progress)
    if progress and settings.workers > 1:
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, \
            TextColumn, TimeElapsedColumn

        with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                      TimeElapsedColumn(), console=Console(stderr=True),
                      transient=True) as bar:
            task = bar.add_task(f"learning, selecting and evaluating splits "
                                f"({settings.workers} at a time)", total=settings.repeats)
            parts = run(on_done=lambda: bar.advance(task))
    else:
        parts = run()
    main = parts[0]
    significance = pipeline.compare_parts(parts, settings)
    timings["splits"] = time.perf_counter() - stage
    timings.update({f"main_split_{k}": v for k, v in main.seconds.items()})

    stage = time.perf_counter()
    summary, arrays = _summarize(config, dataset, n_features, blueprint, split, settings, main,
                                 significance)
    timings["diagnostics"] = time.perf_counter() - stage
    stage = time.perf_counter()
    if config["hardware"]["enabled"]:
        summary["hardware"] = hardware_estimate(config, blueprint, main.params, split.X_train,
                                                split.X_test, main.k_train, main.k_test,
                                                split.y_train, split.y_test, main.C)
    timings["hardware"] = time.perf_counter() - stage

    _write_artifacts(out_dir, config, dataset, blueprint, split, main, summary, arrays,
                     timings, started)
    return summary


def enable_compile_cache(setting: str) -> None:
    """Turn on JAX's persistent compilation cache (``compute.compile_cache``).

    A training step takes seconds to compile; with the cache a later run, a reproduce or a
    sweep trial with the same shapes loads it from disk. 'auto' is the user's cache folder
    ($XDG_CACHE_HOME or ~/.cache)/hilbertune/jax; '' turns it off.
    """
    import os

    import jax

    if not setting:
        return
    if setting == "auto":
        base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"),
                                                                ".cache")
        setting = os.path.join(base, "hilbertune", "jax")
    try:
        os.makedirs(setting, exist_ok=True)
    except OSError:
        return  # an unwritable cache folder only costs compile time
    if jax.config.jax_compilation_cache_dir != setting:
        jax.config.update("jax_compilation_cache_dir", setting)
        jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.5)


#: A caution is written when the chosen kernel does not clear the majority-class rate by
#: this much (our choice: 2 points, about one test row in 50).
MAJORITY_MARGIN = 0.02


def _summarize(config, dataset, n_features, blueprint, split, settings, main, significance):
    """summary.json's content (without hardware, timings) and the arrays for kernels.npz."""
    from hilbertune import diagnostics
    from hilbertune.circuits import resource_counts
    from hilbertune.pipeline import gram_function, selection_summary

    y_train, y_test = split.y_train, split.y_test
    selection = main.selection
    rbf, linear = main.baselines["rbf_svm"], main.baselines["linear_svm"]
    expectations = None
    if settings.kernel == "projected":
        from hilbertune.kernels import encoding_expectations

        expectations = np.asarray(encoding_expectations(blueprint, main.params, split.X_train))
    diag, spectra = diagnostics.run_diagnostics(main.k0_train, main.k_train, rbf.gram_train,
                                                y_train, blueprint.n_qubits,
                                                shots=config["evaluation"]["shots"],
                                                kind=settings.kernel, gamma=settings.gamma,
                                                expectations=expectations)
    align0 = (diagnostics.alignment_of(main.k0_train, y_train),
              diagnostics.alignment_of(main.k0_train, y_train, centered=True))
    align1 = (diagnostics.alignment_of(main.k_train, y_train),
              diagnostics.alignment_of(main.k_train, y_train, centered=True))
    sel = selection_summary(selection)
    gram = gram_function(blueprint, settings)
    for row in sel["candidates"]:  # alignment of each candidate on the whole training part
        K = main.k0_train if row["name"] == "untrained" else gram(
            selection.params[row["name"]], split.X_train)
        row["alignment"] = diagnostics.alignment_of(K, y_train)
        row["centered_alignment"] = diagnostics.alignment_of(K, y_train, centered=True)

    run = _reported_run(selection)
    params, params0 = main.params, selection.params["untrained"]
    resources = resource_counts(blueprint)
    cautions = [SIMULATION_CAUTION]
    if diag["concentration"].get("warning"):
        cautions.append(diag["concentration"]["warning"])
    gram_warning = diag["geometric_difference"].get("classical_gram", {}).get("warning")
    if gram_warning:
        cautions.append(gram_warning)
    if dataset.invented:
        cautions.append("The dataset is invented by hilbertune's demo generator; results say "
                        "nothing about any real system.")
    largest = max(s.trainable_parameters for s in selection.scores)
    if largest > OVERPARAMETERIZED * len(y_train):
        cautions.append(
            f"The fully learned candidates have {largest} trainable parameters for "
            f"{len(y_train)} training rows (more than {OVERPARAMETERIZED:.0%} of the rows): "
            "they can fit noise. Selection guards against it; fewer layers or qubits, or "
            "training.freeze, make learning more reliable.")
    if run is not None and run.stop_reason and "non-finite" in run.stop_reason.lower():
        cautions.append(f"Training stopped early: {run.stop_reason}")
    floor = significance["per_repeat"].get("majority_class")
    chosen_mean = float(np.mean(significance["per_repeat"]["quantum"]))
    if floor and chosen_mean < np.mean(floor) + MAJORITY_MARGIN:
        cautions.append(
            f"The chosen kernel's mean test accuracy over the splits "
            f"({chosen_mean:.3f}) is within "
            f"{MAJORITY_MARGIN * 100:.0f} points of always answering the most common class "
            f"({np.mean(floor):.3f}): accuracy says little on these classes; compare per-class "
            "results (predict) or rebalance the data.")
    cautions.append(f"Accuracies come from one split of {len(y_train)} training and "
                    f"{len(y_test)} test rows; the significance tests use {len(significance['per_repeat']['quantum'])} "
                    "repeated splits, each with its own learning and selection.")

    classes = np.unique(np.asarray(dataset.y))
    summary = {
        "format_version": artifacts.FORMAT_VERSION,
        "n_qubits": blueprint.n_qubits,
        "seed": settings.seed,
        "objective": config["training"]["objective"],
        "train_accuracy": main.train_accuracy,
        "test_accuracy": main.accuracies["chosen"],
        "untrained_test_accuracy": main.accuracies["untrained"],
        "chosen_kernel": selection.chosen,
        "alignment": {"initial": align0[0], "final": align1[0],
                      "centered_initial": align0[1], "centered_final": align1[1]},
        "svm": {"C": main.C, "tuned_by_cv": main.C_tuned},
        "selection": sel,
        "baselines": {
            "rbf_svm": rbf.summary(),
            "linear_svm": linear.summary(),
            "untrained_quantum": {"test_accuracy": main.accuracies["untrained"]},
            "majority_class": {"test_accuracy": main.accuracies["majority_class"]},
            **{key: main.baselines[key].summary() for key in (
                "rbf_svm_all_features", "linear_svm_all_features") if key in main.baselines},
        },
        "significance": significance,
        "diagnostics": diag,
        "dataset": {"source": dataset.source, "invented": bool(dataset.invented),
                    "sha256": dataset.sha256, "n_samples": int(len(dataset.y)),
                    "n_features_raw": int(dataset.X.shape[1]), "n_features": n_features,
                    "reduction": split.preprocessing.reduce,
                    "feature_names": list(dataset.feature_names),
                    "target": dataset.target_name, "classes": [str(c) for c in classes],
                    "train_size": int(len(y_train)), "test_size": int(len(y_test)),
                    "test_fraction": settings.test_fraction},
        "encoding": {"family": blueprint.family, "kind": settings.kernel},
        "circuit": resources,
        "training": {
            "reported_run": None if run is None else _run_key(selection),
            "steps_run": 0 if run is None else len(run.history),
            "stop_reason": "nothing learned" if run is None else run.stop_reason,
            "best_step": 0 if run is None else run.best_step,
            "bandwidth_initial": float(math.exp(float(params0["log_bandwidth"]))),
            "bandwidth_final": float(math.exp(float(params["log_bandwidth"]))),
            # seconds of the reported training loop (summed over resumed sessions)
            "wall_time_s": float(run.history[-1].get("wall_time", 0.0))
            if run is not None and run.history else 0.0},
        "hardware": None,
        "cautions": cautions,
        "versions": artifacts.library_versions(),
    }
    arrays = {"spectra": spectra, "rbf_gram": rbf.gram_train,
              "history": [] if run is None else run.history}
    return summary, arrays


#: Share of training rows above which the trainable parameter count earns a caution
#: (common practice: far fewer parameters than rows; a documented choice, not a law).
OVERPARAMETERIZED = 0.25


def _run_key(selection):
    """The training run whose history is written: the chosen candidate's, or else the one
    of the fully learned candidates (what learning did, even when it was not chosen)."""
    chosen = next(s.candidate for s in selection.scores if s.candidate.name == selection.chosen)
    if chosen.scope in ("bandwidth", "full"):
        return f"{chosen.scope}/{chosen.objective}"
    for key in selection.runs:
        if key.startswith("full/"):
            return key
    return next(iter(selection.runs), None)


def _reported_run(selection):
    key = _run_key(selection)
    return None if key is None else selection.runs[key]


def _write_artifacts(out_dir, config, dataset, blueprint, split, main, summary, arrays, timings,
                     started):
    from hilbertune import report
    from hilbertune.qasm import encoding_to_qasm3
    from hilbertune.report import build_report

    stage = time.perf_counter()
    params, params0 = main.params, main.selection.params["untrained"]
    X_train, y_train, y_test = split.X_train, split.y_train, split.y_test
    try:
        qasm_text = encoding_to_qasm3(blueprint, params)
    except InvalidInputError as exc:
        qasm_text = f"// not exported: {exc}\n"
    classes = np.unique(np.asarray(dataset.y))
    param_arrays = {f"param_{k}": np.asarray(v) for k, v in params.items()}
    param_arrays.update({f"initial_{k}": np.asarray(v) for k, v in params0.items()})
    param_arrays.update({f"prep_{k}": v for k, v in split.preprocessing.to_arrays().items()})
    param_arrays.update({"X_train": X_train, "y_train": np.asarray(y_train).astype(str),
                         "classes": classes.astype(str), "svm_C": np.asarray(main.C)})
    artifacts.write_npz(out_dir / "params.npz", param_arrays)
    kernel_arrays = {"train_initial": main.k0_train, "train_final": main.k_train,
                     "train_rbf": arrays["rbf_gram"], "y_train": _label_ids(y_train, classes),
                     "y_test": _label_ids(y_test, classes),
                     **{f"spectrum_{k}": v for k, v in arrays["spectra"].items()}}
    if X_train.shape[1] == 2 and blueprint.n_qubits <= 12:
        xs, ys, grid = _boundary(config, blueprint, params, main.model, X_train,
                                 config["encoding"]["kind"])
        kernel_arrays.update({"boundary_x": xs, "boundary_y": ys, "boundary_grid": grid,
                              "X_train": X_train, "X_test": split.X_test})
    artifacts.write_npz(out_dir / "kernels.npz", kernel_arrays)
    artifacts.write_csv_rows(out_dir / "history.csv", arrays["history"], list(HISTORY_COLUMNS))
    artifacts.write_text(out_dir / "circuit.qasm", qasm_text)
    timings["artifacts"] = time.perf_counter() - stage
    # seconds per stage of this fit (noisy on shared machines; the benchmark
    # experiments/bench_fit.py gives medians)
    summary["timings"] = {k: float(v) for k, v in timings.items()}
    summary["wall_time_s"] = time.perf_counter() - started
    summary["headline"] = report.headline(summary)
    artifacts.write_json(out_dir / "summary.json", summary)
    build_report(out_dir)
    artifacts.write_manifest(out_dir, seed=config["seed"], data_sha256=dataset.sha256,
                             artifacts=list(ARTIFACTS))
    if (out_dir / "checkpoints").is_dir():
        shutil.rmtree(out_dir / "checkpoints")  # the run is complete; params.npz holds it


def _label_ids(y, classes):
    lookup = {str(c): i for i, c in enumerate(classes)}
    return np.array([lookup[str(v)] for v in y], dtype=np.int64)


def hardware_estimate(config, blueprint, params, X_train, X_test, k_train, k_test, y_train,
                      y_test, C) -> dict:
    """Shot budget (noiseless and under device noise) for the chosen kernel (``hardware``)."""
    from hilbertune import hardware

    return hardware.run_estimate(config["hardware"], blueprint, params, X_train, X_test,
                                 k_train, k_test, y_train, y_test, C=C, seed=config["seed"],
                                 kind=config["encoding"]["kind"],
                                 gamma=config["encoding"]["gamma"])


def summary_lines(summary: dict) -> list:
    """Plain lines for the terminal: the report's headline first, then which kernel was
    chosen and why, and the dataset."""
    from hilbertune import report

    head = summary.get("headline") or report.headline(summary)
    lines = list(report.headline_lines(head))
    sel = summary.get("selection") or {}
    if sel:
        lines.append(f"chosen kernel: {sel['chosen']} (inner-CV accuracy "
                     f"{sel['cv_accuracy']:.3f} +- {sel['cv_accuracy_sd']:.3f} over "
                     f"{sel['folds']} folds of the training part, split drawn "
                     f"{sel.get('repeats', 1)} time(s)); "
                     f"{sel['reason']}")
    lines.append(f"dataset: {summary['dataset']['source']}")
    return lines


# --------------------------------------------------------------------------- reading runs

def _map_retired_names(user: dict) -> list:
    """Rewrite, in place, names an older run's config.toml may hold; one note per change.

    ``encoding.reps`` (the repetitions of the iqp family) became ``encoding.layers``, which
    now serves both the layered and the iqp family; for other families it was unused.
    """
    from hilbertune import config as cfg

    notes = []
    for old, new in cfg.RETIRED_KEYS.items():
        old_section, old_key = old.split(".")
        section = user.get(old_section)
        if not isinstance(section, dict) or old_key not in section:
            continue
        value = section.pop(old_key)
        if old == "encoding.reps" and section.get("family") != "iqp":
            notes.append(f"dropped old name {old} (unused by the {section.get('family')!r} "
                         "encoding)")
            continue
        new_section, new_key = new.split(".")
        user.setdefault(new_section, {})[new_key] = value
        notes.append(f"mapped old name {old} to {new}")
    for (dotted, old), new in cfg.RETIRED_VALUES.items():
        section, key = dotted.split(".")
        if isinstance(user.get(section), dict) and user[section].get(key) == old:
            user[section][key] = new
            notes.append(f"mapped old name {dotted} = {old!r} to {new!r}")
    return notes


def load_run(run_dir, rebuilt=()):
    """Verified artifacts of a finished run: (config, params, arrays, summary).

    ``rebuilt``: derived files about to be written again, not checked (``verify_run``).

    A config.toml written before a rename is translated explicitly (``_map_retired_names``);
    the notes go to ``summary["mapped_names"]`` (absent when nothing was mapped).
    """
    from hilbertune import config as cfg

    run_dir = Path(run_dir)
    manifest = artifacts.verify_run(run_dir, rebuilt=rebuilt)
    unlisted = [name for name in ("config.toml", "params.npz", "summary.json")
                if name not in manifest["artifacts"]]
    if unlisted:
        raise ArtifactError(f"{artifacts.MANIFEST} in {str(run_dir)!r} does not cover "
                            f"{', '.join(unlisted)}, so they cannot be trusted; rerun the fit")
    try:
        user = cfg.load_toml(run_dir / "config.toml")
        mapped = _map_retired_names(user)
        config = cfg.resolve_config(user)
    except InvalidInputError as exc:
        raise ArtifactError(f"config.toml in {str(run_dir)!r} is not usable ({exc})") from None
    arrays = artifacts.read_npz(run_dir / "params.npz")
    params = {k[len("param_"):]: arrays[k] for k in arrays if k.startswith("param_")}
    needed = ("X_train", "y_train", "svm_C")
    if set(params) != {"weights", "biases", "log_bandwidth"} or any(k not in arrays
                                                                      for k in needed):
        raise ArtifactError(f"params.npz in {str(run_dir)!r} lacks the learned parameters or "
                            "the training data of the SVM; rerun the fit")
    summary = artifacts.read_json(run_dir / "summary.json")
    if not isinstance(summary, dict) or not isinstance(summary.get("dataset"), dict):
        raise ArtifactError(f"summary.json in {str(run_dir)!r} has no dataset section; rerun "
                            "the fit")
    if mapped:
        summary["mapped_names"] = mapped
    return config, params, arrays, summary


def predict_csv(run_dir, csv_path) -> list:
    """Predicted labels for every row of a CSV with the run's feature columns."""
    from hilbertune import data
    from sklearn.svm import SVC

    config, params, arrays, summary = load_run(run_dir)
    names = summary["dataset"]["feature_names"]
    X = data.load_features(csv_path, names)
    prep = data.Preprocessing.from_arrays({k[len("prep_"):]: v for k, v in arrays.items()
                                           if k.startswith("prep_")})
    with np.errstate(all="ignore"):  # overflow is reported below, not as a warning
        data.check_new_rows(prep._replace(clip=False).transform(X), prep.feature_range,
                            names if prep.reduce != "pca" else [], str(csv_path))
    X = prep.transform(X)
    X_train, y_train = arrays["X_train"], arrays["y_train"]
    blueprint = build_blueprint(config, X_train.shape[1])
    k_train, k_new = kernel_pair(config, blueprint, params, X_train, X)
    model = SVC(kernel="precomputed", C=float(arrays["svm_C"])).fit(k_train, y_train)
    return list(model.predict(k_new))


def export_circuit(run_dir, *, kernel_circuit: bool = False):
    """OpenQASM 3 text of a run's learned encoding (or its kernel-estimation circuit)."""
    from hilbertune.circuits import resource_counts
    from hilbertune.qasm import encoding_to_qasm3, kernel_circuit_to_qasm3

    config, params, arrays, summary = load_run(run_dir)
    blueprint = build_blueprint(config, arrays["X_train"].shape[1])
    make = kernel_circuit_to_qasm3 if kernel_circuit else encoding_to_qasm3
    return make(blueprint, params), resource_counts(blueprint)


def _check_keep(run_dir, keep, overwrite: bool) -> None:
    keep = Path(keep)
    if keep.exists() and not keep.is_dir():
        raise InvalidInputError(f"--keep {str(keep)!r} is a file; choose a directory path for "
                                "the rerun")
    if keep.resolve() == Path(run_dir).resolve():
        raise InvalidInputError(f"--keep {str(keep)!r} is the run being reproduced; choose "
                                "another directory for the rerun")
    if keep.is_dir() and any(keep.iterdir()) and not overwrite:
        raise InvalidInputError(f"--keep directory {str(keep)!r} already exists and is not "
                                "empty; choose another --keep or pass --overwrite to replace "
                                "the run there")


def _locate_data(config: dict, manifest: dict, data) -> dict:
    """The config with a CSV path that exists and holds the recorded data (SHA-256 checked).

    ``data``: a path the user gave (``reproduce --data``), or None: then the saved path,
    else the resolved path the manifest recorded, is used.
    """
    import copy
    import hashlib

    if config["data"]["source"] != "csv":
        if data is not None:
            raise InvalidInputError(f"--data applies to runs on a CSV file; this run used "
                                    f"{config['data']['source']!r}, drop --data")
        return config
    expected = manifest.get("data_sha256")
    if data is None:
        candidates = [config["data"]["path"], manifest.get("data_path")]
        found = next((p for p in candidates if isinstance(p, str) and p and Path(p).is_file()),
                     None)
        if found is None:
            raise InvalidInputError(f"the run's data file {config['data']['path']!r} is not found "
                                    "from here; pass it with --data PATH (checked against the "
                                    "recorded SHA-256)")
        path, given = Path(found), False
    else:
        path, given = Path(data), True
        if not path.is_file():
            raise InvalidInputError(f"--data {str(path)!r} is not a file; pass the CSV file the "
                                    "run was made with")
    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    if digest != expected:
        where = f"--data {str(path)!r}" if given else f"the data file {str(path)!r}"
        raise InvalidInputError(f"{where} is not the file the run was made with (its SHA-256 "
                                f"{digest[:12]}... differs from the recorded "
                                f"{str(expected)[:12]}...); pass the original file with --data")
    config = copy.deepcopy(config)
    config["data"]["path"] = str(path)
    return config


def reproduce_run(run_dir, *, keep=None, overwrite: bool = False, data=None,
                  progress: bool = False):
    """Rerun from the saved config and seed; compare parameters and metrics.

    Args:
      keep: keep the rerun in this directory (refused when it holds files, unless
        ``overwrite``); None: a temporary directory, deleted afterwards.
      data: the CSV file of the run when its saved path does not reach it from here; its
        SHA-256 must equal the recorded one.

    Returns:
      (identical: bool, differences: list of readable strings, notes: list of old config
      names mapped to their new ones, e.g. "mapped old name encoding.reps to
      encoding.layers").
    """
    if keep is not None:
        _check_keep(run_dir, keep, overwrite)
    config, params, arrays, summary = load_run(run_dir)
    config = _locate_data(config, artifacts.read_json(Path(run_dir) / artifacts.MANIFEST), data)
    target = Path(keep) if keep else Path(tempfile.mkdtemp(prefix="hilbertune-reproduce-"))
    try:
        new_summary = execute_fit(config, target, overwrite=keep is not None and overwrite,
                                  progress=progress)
        new_arrays = artifacts.read_npz(target / "params.npz")
        differences = []
        for key in sorted(set(arrays) | set(new_arrays)):
            a, b = arrays.get(key), new_arrays.get(key)
            if a is None or b is None:
                differences.append(f"{key}: present in only one run")
            elif a.shape != b.shape or a.tobytes() != b.tobytes():
                gap = (float(np.max(np.abs(a.astype(float) - b.astype(float))))
                       if a.shape == b.shape and a.dtype.kind in "fiu" else "n/a")
                differences.append(f"{key}: arrays differ (max abs difference {gap})")
        for key in ("train_accuracy", "test_accuracy", "untrained_test_accuracy"):
            if summary.get(key) != new_summary.get(key):
                differences.append(f"{key}: {summary.get(key)} then {new_summary.get(key)}")
        for key in ("initial", "final"):
            if summary["alignment"][key] != new_summary["alignment"][key]:
                differences.append(f"alignment.{key}: {summary['alignment'][key]} then "
                                   f"{new_summary['alignment'][key]}")
        return not differences, differences, summary.get("mapped_names", [])
    finally:
        if keep is None:
            shutil.rmtree(target, ignore_errors=True)
