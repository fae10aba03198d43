"""The public surface: every exported name exists (house style, STYLE.md)."""

from __future__ import annotations

import hilbertune


def test_every_name_in_all_exists():
    missing = [name for name in hilbertune.__all__ if not hasattr(hilbertune, name)]
    assert missing == []


def test_all_has_no_duplicates_and_only_strings():
    assert all(isinstance(name, str) for name in hilbertune.__all__)
    assert len(set(hilbertune.__all__)) == len(hilbertune.__all__)


def test_version_is_a_dotted_string():
    parts = hilbertune.__version__.split(".")
    assert len(parts) >= 2 and all(p.isdigit() for p in parts[:2])


def test_errors_share_one_base_class():
    # every public error type derives from HilbertuneError (src/hilbertune/errors.py)
    for name in hilbertune.__all__:
        obj = getattr(hilbertune, name)
        if isinstance(obj, type) and issubclass(obj, Exception):
            assert issubclass(obj, hilbertune.HilbertuneError), name
