"""Context columns: the join of held-out events to their user's known pairs, against a pandas merge."""

from __future__ import annotations

import numpy as np
import pandas as pd
import torch

from towers.data.context import event_pairs
from towers.data.pairs import Pairs


def test_event_join_matches_pandas_merge():
    g = torch.Generator().manual_seed(3)
    test = Pairs(torch.randint(0, 20, (50,), generator=g), torch.randint(0, 30, (50,), generator=g))
    known = Pairs(torch.randint(0, 25, (200,), generator=g), torch.randint(0, 30, (200,), generator=g))
    events, known_e, users = event_pairs(test, known)
    assert torch.equal(users, test.query) and torch.equal(events.query, torch.arange(50))
    ours = sorted(zip(known_e.query.tolist(), known_e.candidate.tolist()))
    # reference: pandas inner join of events to known pairs on the user
    ev = pd.DataFrame({"event": np.arange(50), "user": test.query.numpy()})
    kn = pd.DataFrame({"user": known.query.numpy(), "item": known.candidate.numpy()})
    ref = sorted(map(tuple, ev.merge(kn, on="user")[["event", "item"]].to_numpy().tolist()))
    assert ours == ref
