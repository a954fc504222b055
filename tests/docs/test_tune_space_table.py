"""README.md's table of the `towers tune` search space must say what towers/runs/tune_space.py searches."""

from __future__ import annotations

from pathlib import Path

from towers.runs import tune_space as S

ROOT = Path(__file__).resolve().parents[2]


def test_readme_lists_every_range_of_the_search_space():
    lines = (ROOT / "README.md").read_text(encoding="utf-8").splitlines()
    start = lines.index("| key | range | searched when | why |")
    rows = []
    for line in lines[start + 2:]:
        if not line.startswith("|"):
            break
        rows.append(line)
    switched = ("`model.normalize`", "`model.feature_bias`")
    ranged = [r for r in rows if "switch" not in r and not any(key in r for key in switched)]
    assert ranged == S.readme_rows(), "README.md's tune space table differs from tune_space.RANGES; copy readme_rows()"
    # every switch is described beside the ranges
    for start in ("| `model.normalize` |", "| `model.feature_bias` |", "| `model.history_length` switch |",
                  "| `model.history_past_only` switch |"):
        assert any(r.startswith(start) for r in rows), start
    assert len(S.SWITCHES) == 4
