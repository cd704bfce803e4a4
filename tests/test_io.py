"""Atomic writes: a failure never leaves a partial file under the final name."""

import json

import pytest

from allolaw.io import atomic_path, write_json


def test_atomic_path_leaves_nothing_when_writing_fails(tmp_path):
    target = tmp_path / "out.csv"
    with pytest.raises(RuntimeError), atomic_path(target) as tmp:
        tmp.write_text("half")
        raise RuntimeError("killed")
    assert not target.exists()
    assert list(tmp_path.iterdir()) == []


def test_atomic_path_keeps_the_old_file_until_success(tmp_path):
    target = tmp_path / "out.csv"
    target.write_text("old")
    with pytest.raises(RuntimeError), atomic_path(target) as tmp:
        tmp.write_text("new")
        raise RuntimeError
    assert target.read_text() == "old"
    with atomic_path(target) as tmp:
        tmp.write_text("new")
    assert target.read_text() == "new"


def test_write_json_is_sorted_and_handles_numpy(tmp_path):
    import numpy as np

    target = tmp_path / "a" / "b.json"
    write_json(target, {"b": np.float64(1.5), "a": np.arange(2)})
    text = target.read_text()
    assert text.index('"a"') < text.index('"b"')
    assert json.loads(text) == {"a": [0, 1], "b": 1.5}
