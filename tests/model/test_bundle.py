"""Model bundles are read without unpickling code: pickled callables, truncated files and plain pickles are refused."""

from __future__ import annotations

import pickle

import pytest
import torch

from towers.errors import TowersError
from towers.model.bundle import load_payload


class _Boom:
    def __reduce__(self):
        return (exec, ("open('PWNED', 'w').write('x')",))


def test_bundle_with_pickled_code_is_refused(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    path = tmp_path / "model.pt"
    torch.save({"format": "towers-model", "evil": _Boom()}, path)
    with pytest.raises(TowersError, match="refused"):
        load_payload(path)
    assert not (tmp_path / "PWNED").exists()  # nothing ran


def test_truncated_bundle_is_reported(tmp_path):
    path = tmp_path / "model.pt"
    torch.save({"format": "towers-model", "w": torch.randn(100, 100)}, path)
    path.write_bytes(path.read_bytes()[:2000])
    with pytest.raises(TowersError, match="corrupt or truncated"):
        load_payload(path)


def test_plain_pickle_is_not_a_bundle(tmp_path):
    path = tmp_path / "model.pt"
    path.write_bytes(pickle.dumps({"a": 1}))
    with pytest.raises(TowersError):
        load_payload(path)
