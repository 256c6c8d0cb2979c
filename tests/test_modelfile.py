"""Model files: exact round trip, versioning, and safe failure on damaged or foreign files."""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pytest

import tallfit
from tallfit.errors import ModelFileError
from tallfit.modelfile import FORMAT_VERSION


@pytest.fixture
def model(rng):
    n = 300
    x1, x2 = rng.normal(size=n), rng.uniform(size=n)
    y = 1.5 + 0.3 * x1 - 2 * x2 + rng.normal(size=n)
    x1[7] = np.nan
    return tallfit.fit(pa.table({"a": x1, "b": x2, "y": y}), "y", ["a", "b"])


def test_round_trip_is_bit_exact(model, tmp_path):
    path = tmp_path / "m.json"
    tallfit.save(model, path)
    back = tallfit.load(path)
    assert back.terms == model.terms
    for name in ("estimate", "std_error", "t", "p_value", "ci_low", "ci_high", "cov"):
        np.testing.assert_array_equal(getattr(back.inference, name), getattr(model.inference, name))
    np.testing.assert_array_equal(back.accumulator.R, model.accumulator.canonical_R())
    assert back.to_dict() == model.to_dict()
    assert back.dropped_rows == {"total": 1, "by_column": {"a": 1}}
    doc = json.loads(path.read_text())
    assert doc["format"] == "tallfit-model" and doc["format_version"] == FORMAT_VERSION


def test_newer_version_is_refused(model, tmp_path):
    path = tmp_path / "m.json"
    tallfit.save(model, path)
    doc = json.loads(path.read_text())
    doc["format_version"] = FORMAT_VERSION + 1
    path.write_text(json.dumps(doc))
    with pytest.raises(ModelFileError, match="upgrade tallfit"):
        tallfit.load(path)


@pytest.mark.parametrize(
    "content,match",
    [
        ("not json at all", "not readable JSON"),
        ('{"format": "something-else"}', "not a tallfit model file"),
        ('{"format": "tallfit-model", "format_version": 1, "model": {}}', "damaged or incomplete"),
    ],
)
def test_foreign_or_damaged_files(tmp_path, content, match):
    path = tmp_path / "bad.json"
    path.write_text(content)
    with pytest.raises(ModelFileError, match=match):
        tallfit.load(path)


def test_missing_model_file(tmp_path):
    with pytest.raises(ModelFileError, match="does not exist"):
        tallfit.load(tmp_path / "nope.json")


def test_save_is_atomic_and_keeps_old_file_on_failure(model, tmp_path, monkeypatch):
    path = tmp_path / "m.json"
    path.write_text("old content")
    import tallfit.atomic

    def boom(*a, **k):
        raise OSError("disk full")

    monkeypatch.setattr(tallfit.atomic.os, "replace", boom)
    with pytest.raises(OSError):
        tallfit.save(model, path)
    assert path.read_text() == "old content"
    assert [p.name for p in tmp_path.iterdir()] == ["m.json"]


def test_saved_file_has_the_usual_permissions(model, tmp_path):
    import os
    import stat

    path = tmp_path / "m.json"
    tallfit.save(model, path)
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(path.stat().st_mode) == 0o666 & ~mask
