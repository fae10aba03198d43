"""Configuration schema: defaults, overrides, validation messages, TOML round trip."""

import tomllib

import pytest

from hilbertune import config as cfg
from hilbertune.errors import InvalidInputError


def test_defaults_resolve_and_round_trip_through_toml():
    config = cfg.resolve_config()
    # the written config must read back (with Python's own TOML parser) to the same dict
    assert tomllib.loads(cfg.dump_toml(config)) == config
    assert set(cfg.all_keys()) >= {"seed", "training.steps", "encoding.family"}


def test_overrides_apply_in_order_and_coerce_ints_to_floats():
    config = cfg.resolve_config({"training": {"learning_rate": 1}},
                                [("training.steps", 7), ("encoding.family", "iqp")])
    assert config["training"]["learning_rate"] == 1.0
    assert isinstance(config["training"]["learning_rate"], float)
    assert config["training"]["steps"] == 7
    assert config["encoding"]["family"] == "iqp"


def test_unknown_key_suggests_the_closest():
    with pytest.raises(InvalidInputError, match="did you mean 'training.steps'"):
        cfg.resolve_config({"training": {"stpes": 3}})
    with pytest.raises(InvalidInputError, match="did you mean 'training.steps'"):
        cfg.resolve_config(overrides=[("steps", 3)])


@pytest.mark.parametrize("key, value, fragment", [
    ("training.steps", 0, "positive"),
    ("training.steps", -5, "positive"),
    ("training.learning_rate", 0.0, "positive"),
    ("training.steps", "ten", "must be int"),
    ("evaluation.shots", 0, "positive"),
    ("encoding.family", "quantum", "one of"),
    ("data.test_fraction", 1.5, "in \\(0, 1\\)"),
    ("hardware.one_qubit_error", 2.0, "in \\[0, 1\\]"),
    ("hardware.readout_error", -0.1, "in \\[0, 1\\]"),
    ("training.clip_norm", float("nan"), "finite"),
])
def test_bad_values_are_refused_with_the_rule(key, value, fragment):
    with pytest.raises(InvalidInputError, match=fragment):
        cfg.resolve_config(overrides=[(key, value)])


def test_parse_assignment_reads_toml_values_and_bare_words():
    assert cfg.parse_assignment("training.steps=12") == ("training.steps", 12)
    assert cfg.parse_assignment("encoding.family=iqp") == ("encoding.family", "iqp")
    assert cfg.parse_assignment("encoding.axes=['x','y']") == ("encoding.axes", ["x", "y"])
    with pytest.raises(InvalidInputError, match="key=value"):
        cfg.parse_assignment("training.steps")


def test_bad_toml_names_the_line(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text("[training]\nsteps = = 3\n")
    with pytest.raises(InvalidInputError, match="line 2"):
        cfg.load_toml(path)


def test_csv_source_needs_path_and_target():
    with pytest.raises(InvalidInputError, match="--data FILE.csv --target COLUMN"):
        cfg.resolve_config({"data": {"source": "csv"}})


def test_shots_grid_and_freeze_are_checked():
    with pytest.raises(InvalidInputError, match="shots_grid"):
        cfg.resolve_config(overrides=[("hardware.shots_grid", [10, 0])])
    with pytest.raises(InvalidInputError, match="freeze"):
        cfg.resolve_config(overrides=[("training.freeze", ["weigths"])])


@pytest.mark.parametrize("user, overrides, fragment", [
    ({"encoding": {"reps": 2}}, (), "renamed to 'encoding.layers'"),
    (None, [("encoding.reps", 3)], "renamed to 'encoding.layers'"),
    ({"hardware": {"estimator": "compute_uncompute"}}, (), "renamed to 'inversion_test'"),
    (None, [("hardware.estimator", "compute_uncompute")], "renamed to 'inversion_test'"),
])
def test_retired_names_are_refused_with_the_new_name(user, overrides, fragment):
    with pytest.raises(InvalidInputError, match=fragment):
        cfg.resolve_config(user, overrides)


def test_layers_serves_the_iqp_family_and_help_says_so():
    config = cfg.resolve_config(overrides=[("encoding.family", "iqp"), ("encoding.layers", 3)])
    assert config["encoding"]["layers"] == 3 and "reps" not in config["encoding"]
    assert config["hardware"]["estimator"] == "inversion_test"
    assert "encoding.layers = 2 (positive): repeated blocks of the layered and iqp" \
        in cfg.describe()
