"""Lists printed on a terminal: columns line up whatever script the names are written in."""

from __future__ import annotations

import unicodedata

import pandas as pd

from towers import cli


def _display_width(text: str) -> int:
    # wide and fullwidth characters take two terminal columns: Unicode Standard Annex #11 (East Asian Width)
    return sum(2 if unicodedata.east_asian_width(ch) in ("W", "F") else 1 for ch in text)


def test_names_with_wide_characters_keep_the_columns_in_line():
    frame = pd.DataFrame({"item": ["TR-1", "TR-22", "TR-333"], "name": ["剪定ばさみ", "Trowel", "정원 장갑"],
                          "score": [1.25, 0.5, 0.125]})
    lines = cli._aligned(frame).splitlines()
    # each column ends at the same terminal column on every line (the numbers are right-aligned last)
    assert len({_display_width(line) for line in lines}) == 1, lines


def test_a_value_an_item_lacks_is_blank_not_nan():
    frame = pd.DataFrame({"item": ["TR-1", "TR-22"], "tag": ["garden", None], "price": [4.5, float("nan")],
                          "score": [1.25, 0.5]})
    text = cli._aligned(frame)
    assert "NaN" not in text and "None" not in text
    lines = text.splitlines()
    assert lines[2].split() == ["TR-22", "0.50"]  # the row's own values, blanks between them
    assert len({_display_width(line) for line in lines}) == 1, lines
