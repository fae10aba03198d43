"""Safe reading and writing of run-directory files.

Every file is written to a temporary name in the same folder and renamed into place, so a
crash never leaves a half-written artifact. Arrays go to ``.npz`` without pickle; metadata
to JSON/TOML/CSV. ``manifest.json`` holds the SHA-256 of every artifact and a digest of its
own content; both are checked on load, so a modified file (the manifest included) is refused
by name.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import platform
import sys
import tempfile
import zipfile
from importlib import metadata
from pathlib import Path

import numpy as np

from hilbertune.errors import ArtifactError

FORMAT_VERSION = 1
MANIFEST = "manifest.json"
MANIFEST_DIGEST = "manifest_sha256"  # over the canonical JSON of every other manifest field


def write_bytes(path, payload: bytes) -> None:
    """Write ``payload`` to ``path`` atomically (temporary file + rename)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(payload)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_text(path, text: str) -> None:
    write_bytes(path, text.encode("utf-8"))


def write_json(path, obj) -> None:
    write_text(path, json.dumps(obj, indent=2, sort_keys=True, default=_json_default) + "\n")


def _json_default(obj):
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"not JSON serializable: {type(obj).__name__}")


def write_npz(path, arrays: dict) -> None:
    """Arrays to ``.npz`` (no pickle: object arrays are refused)."""
    buffer = io.BytesIO()
    clean = {}
    for key, value in arrays.items():
        value = np.asarray(value)
        if value.dtype == object:
            raise TypeError(f"array {key!r} has dtype object; store strings as fixed-width 'U'")
        clean[key] = value
    np.savez(buffer, **clean)
    write_bytes(path, buffer.getvalue())


def read_npz(path) -> dict:
    try:
        with np.load(path, allow_pickle=False) as data:
            return {k: data[k] for k in data.files}
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as exc:
        # ValueError includes "Object arrays cannot be loaded when allow_pickle=False"
        raise ArtifactError(f"{Path(path).name} could not be read ({exc}); the run directory "
                            "is damaged: restore the file or rerun the fit") from None


def read_json(path) -> dict:
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ArtifactError(f"{Path(path).name} could not be read ({exc}); the run directory "
                            "is damaged") from None


def write_csv_rows(path, rows: list, columns: list) -> None:
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=columns, extrasaction="ignore",
                            lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: _csv_cell(row.get(k, "")) for k in columns})
    write_text(path, buffer.getvalue())


def _csv_cell(value):
    if isinstance(value, float):
        return repr(value)
    return value


def sha256_file(path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def library_versions() -> dict:
    """Versions of Python and the libraries, plus ``compute_device``: where JAX computes
    and which engine path (``kernels.compute_device``), e.g. "cpu: cpu (host BLAS path)"."""
    from hilbertune.kernels import compute_device

    versions = {"python": sys.version.split()[0]}
    for name in ("hilbertune", "jax", "jaxlib", "numpy", "scipy", "scikit-learn", "optax"):
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    versions["compute_device"] = compute_device()
    return versions


def write_manifest(run_dir, *, seed: int, data_sha256: str, artifacts: list) -> dict:
    """Hash every artifact and write ``manifest.json`` last."""
    run_dir = Path(run_dir)
    manifest = {
        "format_version": FORMAT_VERSION,
        "tool": "hilbertune",
        "versions": library_versions(),
        "platform": {"system": platform.system(), "machine": platform.machine(),
                     "platform": platform.platform(), "processor": platform.processor()},
        "seed": seed,
        "data_sha256": data_sha256,
        "artifacts": {name: sha256_file(run_dir / name) for name in sorted(artifacts)},
    }
    return _seal_manifest(run_dir, manifest)


def manifest_digest(manifest: dict) -> str:
    """SHA-256 of the canonical JSON of every manifest field but the digest itself."""
    body = {k: v for k, v in manifest.items() if k != MANIFEST_DIGEST}
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True,
                      default=_json_default)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _seal_manifest(run_dir: Path, manifest: dict) -> dict:
    manifest = {k: v for k, v in manifest.items() if k != MANIFEST_DIGEST}
    manifest[MANIFEST_DIGEST] = manifest_digest(manifest)
    write_json(run_dir / MANIFEST, manifest)
    return manifest


def update_manifest(run_dir, **fields) -> dict:
    """Add ``fields`` to a finished run's manifest (after checking it) and seal it again."""
    run_dir = Path(run_dir)
    manifest = verify_run(run_dir)
    manifest.update(fields)
    return _seal_manifest(run_dir, manifest)


def record_rebuilt(run_dir, name: str) -> dict:
    """Record the new digest of a derived artifact that was written again (the report,
    rebuilt by a newer version) in the run's manifest, after checking every other file,
    and seal the manifest again. Without this the next check would call the run modified.
    """
    run_dir = Path(run_dir)
    manifest = verify_run(run_dir, rebuilt=(name,))
    if name in manifest["artifacts"]:
        manifest["artifacts"][name] = sha256_file(run_dir / name)
    return _seal_manifest(run_dir, manifest)


def verify_run(run_dir, rebuilt=()) -> dict:
    """Check a run directory against its manifest; returns the manifest.

    Raises ArtifactError naming the first missing or modified file, or a newer format.
    Files named in ``rebuilt`` (derived ones about to be written again, e.g. the report)
    are not checked.
    """
    run_dir = Path(run_dir)
    if run_dir.is_file():
        raise ArtifactError(f"{str(run_dir)!r} is a file, not a run directory; pass the folder "
                            "that `hilbertune fit --out` wrote")
    if not run_dir.is_dir():
        raise ArtifactError(f"run directory {str(run_dir)!r} not found; pass the folder that "
                            "`hilbertune fit --out` wrote")
    path = run_dir / MANIFEST
    if not path.is_file():
        raise ArtifactError(f"{str(run_dir)!r} has no {MANIFEST}: it is not a finished run "
                            "directory (an interrupted run resumes with `hilbertune fit` and "
                            "the same --out)")
    manifest = read_json(path)
    listed = manifest.get("artifacts") if isinstance(manifest, dict) else None
    if not isinstance(listed, dict) or not all(
            isinstance(name, str) and isinstance(digest, str) for name, digest in listed.items()):
        raise ArtifactError(f"{MANIFEST} in {str(run_dir)!r} is not a hilbertune manifest (no "
                            "table of artifact hashes); restore it or rerun the fit")
    version = manifest.get("format_version")
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise ArtifactError(f"{MANIFEST} in {str(run_dir)!r} has no valid format_version "
                            f"(got {version!r}); restore it or rerun the fit")
    if version > FORMAT_VERSION:
        raise ArtifactError(f"{str(run_dir)!r} was written by a newer hilbertune (format "
                            f"{version!r}, this version reads {FORMAT_VERSION}); upgrade "
                            "hilbertune to read it")
    digest = manifest.get(MANIFEST_DIGEST)
    if not isinstance(digest, str):
        raise ArtifactError(f"{MANIFEST} in {str(run_dir)!r} has no {MANIFEST_DIGEST} (its own "
                            "digest), so its seed and data hash cannot be trusted; restore it "
                            "or rerun the fit")
    if digest != manifest_digest(manifest):
        raise ArtifactError(f"{MANIFEST} in {str(run_dir)!r} was edited after the run (its "
                            f"content no longer matches its {MANIFEST_DIGEST}); restore the "
                            "original or rerun the fit")
    for name, digest in listed.items():
        if Path(name).name != name or name in ("", ".", ".."):
            raise ArtifactError(f"{MANIFEST} in {str(run_dir)!r} lists {name!r}, which is not "
                                "a file of the run directory; restore the manifest or rerun")
        file = run_dir / name
        if name in rebuilt:
            continue
        if not file.is_file():
            raise ArtifactError(f"{name} is missing from {str(run_dir)!r}; restore it or rerun "
                                "the fit")
        if sha256_file(file) != digest:
            raise ArtifactError(f"{name} in {str(run_dir)!r} was modified after the run (its "
                                "SHA-256 differs from manifest.json); restore the original or "
                                "rerun the fit")
    return manifest
