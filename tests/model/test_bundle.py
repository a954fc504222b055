"""Model bundles are read without unpickling code: pickled callables, truncated files and plain pickles are refused;
fitted encoder settings (date references, clip bounds) come back as they were saved."""

from __future__ import annotations

import pickle

import numpy as np
import pandas as pd
import pytest
import torch

from towers.config import ModelSection
from towers.data.encoders import DateEncoder, IdEncoder, NumericEncoder
from towers.data.features import SideEncoders
from towers.errors import TowersError
from towers.model.bundle import load_bundle, load_payload, save_bundle
from towers.model.towers import TwoTowerModel


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


def test_round_trip_keeps_the_reference_date_and_the_clip_bounds(tmp_path):
    rows = pd.DataFrame({"price": [2.0, 15.5, 99.0, None, 480.0], "listed": ["2026-03-14", "2025-10-01", None,
                                                                          "2026-01-20T16:00:00-05:00", "2024-07-07"]})
    features = [NumericEncoder("price", log1p=True, clip_lower=0.2, clip_upper=0.8).fit(rows["price"], "items.csv"),
                DateEncoder("listed", calendar=True).fit(rows["listed"], "items.csv")]
    items = SideEncoders(IdEncoder.fit(np.arange(5)), features, "item")
    users = SideEncoders(IdEncoder.fit(np.arange(3)), [], "user")
    cfg = ModelSection(dim=4, hidden=(8,))
    model = TwoTowerModel(users.model_inputs(), users.id_encoder.size, items.model_inputs(), items.id_encoder.size, cfg)
    save_bundle(tmp_path / "model.pt", model, cfg, users.model_inputs(), items.model_inputs(), users, items, False)
    loaded = load_bundle(tmp_path / "model.pt")  # torch.load(weights_only=True): plain data only
    price, listed = loaded.candidate_encoders.encoders
    # reference: the fitted encoders before saving (quantiles and reference came from the training rows)
    assert (price.low, price.high) == (features[0].low, features[0].high) and price.high is not None
    assert listed.reference_date == features[1].reference_date == "2026-03-14T00:00:00"
    unseen = pd.DataFrame({"price": [1e6, 0.0], "listed": ["2030-01-01", None]})
    for before, after in zip(features, (price, listed)):
        assert torch.equal(after.transform(unseen[before.name], "new.csv"), before.transform(unseen[before.name], "new.csv"))
