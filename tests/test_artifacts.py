"""Atomic writes, pickle-free arrays, manifest verification."""

import json

import numpy as np
import pytest

from hilbertune import artifacts
from hilbertune.errors import ArtifactError


def _make_run(tmp_path):
    artifacts.write_text(tmp_path / "a.txt", "hello\n")
    artifacts.write_npz(tmp_path / "b.npz", {"w": np.arange(3.0), "names": np.array(["x", "y"])})
    artifacts.write_manifest(tmp_path, seed=3, data_sha256="0" * 64, artifacts=["a.txt", "b.npz"])
    return tmp_path


def test_manifest_verifies_and_detects_a_modified_file(tmp_path):
    run = _make_run(tmp_path)
    manifest = artifacts.verify_run(run)
    assert manifest["seed"] == 3 and set(manifest["artifacts"]) == {"a.txt", "b.npz"}
    (run / "a.txt").write_text("tampered\n")
    with pytest.raises(ArtifactError, match="a.txt .* was modified"):
        artifacts.verify_run(run)


def test_a_rebuilt_file_is_recorded_only_when_every_other_file_checks_out(tmp_path):
    import hashlib

    run = _make_run(tmp_path)
    (run / "a.txt").write_text("rebuilt by a newer version\n")
    with pytest.raises(ArtifactError, match="a.txt .* was modified"):
        artifacts.verify_run(run)
    assert artifacts.verify_run(run, rebuilt=("a.txt",))["seed"] == 3
    manifest = artifacts.record_rebuilt(run, "a.txt")
    # the new digest is the file's SHA-256 (hashlib), and the sealed manifest verifies
    assert manifest["artifacts"]["a.txt"] == hashlib.sha256(
        b"rebuilt by a newer version\n").hexdigest()
    artifacts.verify_run(run)
    # any other modified file still refuses the run, rebuilt or not
    (run / "b.npz").write_bytes(b"tampered")
    with pytest.raises(ArtifactError, match="b.npz .* was modified"):
        artifacts.record_rebuilt(run, "a.txt")


def test_missing_artifact_and_newer_format_are_refused(tmp_path):
    run = _make_run(tmp_path)
    (run / "b.npz").unlink()
    with pytest.raises(ArtifactError, match="b.npz is missing"):
        artifacts.verify_run(run)
    manifest = json.loads((run / "manifest.json").read_text())
    manifest["format_version"] = artifacts.FORMAT_VERSION + 1
    (run / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(ArtifactError, match="newer hilbertune"):
        artifacts.verify_run(run)


def test_npz_round_trip_without_pickle(tmp_path):
    artifacts.write_npz(tmp_path / "p.npz", {"a": np.eye(2), "s": np.array(["u", "v"])})
    out = artifacts.read_npz(tmp_path / "p.npz")
    assert np.array_equal(out["a"], np.eye(2)) and out["s"].tolist() == ["u", "v"]
    with pytest.raises(TypeError, match="dtype object"):
        artifacts.write_npz(tmp_path / "q.npz", {"o": np.array([{}, 1], dtype=object)})
    # a pickled object array written by someone else must not be loaded
    np.save(tmp_path / "evil.npy", np.array([{"x": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(ValueError):
        np.load(tmp_path / "evil.npy", allow_pickle=False)


def test_atomic_write_leaves_no_temporary_files(tmp_path):
    artifacts.write_json(tmp_path / "s.json", {"x": np.float32(1.5)})
    assert json.loads((tmp_path / "s.json").read_text()) == {"x": 1.5}
    assert [p.name for p in tmp_path.iterdir()] == ["s.json"]
