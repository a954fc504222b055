"""README.md's config reference is generated from the schema (scripts/config_table.py) and must match it."""

from __future__ import annotations

import importlib.util
from pathlib import Path
from types import SimpleNamespace

import pytest

ROOT = Path(__file__).resolve().parents[2]
FIX = ".venv/bin/python scripts/config_table.py --write"


def _generator():
    spec = importlib.util.spec_from_file_location("config_table", ROOT / "scripts" / "config_table.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


config_table = _generator()


def test_readme_block_matches_the_schema():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    try:
        _, block, _ = config_table.split_readme(readme)
    except ValueError as exc:
        pytest.fail(f"README.md: {exc}; restore the two marker lines, then run `{FIX}`")
    expected = config_table.render()
    if block != expected:
        written, wanted = block.splitlines(), expected.splitlines()
        first = next((i for i, (a, b) in enumerate(zip(written, wanted)) if a != b), min(len(written), len(wanted)))
        pytest.fail(
            "README.md's config reference differs from the schema in towers/config.py "
            f"(first difference at line {first + 1} of the block:\n  README: "
            f"{written[first] if first < len(written) else '(end)'}\n  schema: "
            f"{wanted[first] if first < len(wanted) else '(end)'}\n); regenerate it with `{FIX}`",
            pytrace=False)


def test_every_declared_key_is_listed():
    from towers.config import FEATURE_KEYS, SCHEMA

    block = config_table.render()
    for section, keys in SCHEMA.items():
        for name in keys:
            assert f"`{section}.{name}`" in block, f"{section}.{name} missing from the generated reference"
    for name in FEATURE_KEYS:
        assert f"| `{name}` |" in block, f"feature key {name} missing from the generated reference"


def _key(kind, default, meaning, low=None, high=None, low_open=False, choices=(), nullable=False):
    # only these attributes: the generator must not depend on anything else of the schema's key objects
    return SimpleNamespace(kind=kind, default=default, meaning=meaning, low=low, high=high, low_open=low_open,
                           choices=choices, nullable=nullable)


def test_generator_reads_only_the_declared_attributes():
    schema = {
        "run": {"mode": _key("choice", "a", "pick one", choices=("a", "b")),
                "rate": _key("float", 0.5, "a | b", low=0.0, high=1.0, low_open=True)},
        "users": {"path": _key("path", None, "table", nullable=True)},
        "items": {"path": _key("path", None, "table", nullable=True)},
    }
    features = {"name": _key("str", None, "column"), "sep": _key("str", "|", "delimiter")}
    block = config_table.render(schema, features)
    assert "| `run.mode` | a / b | `a` | pick one |" in block
    assert "| `run.rate` | float (> 0, <= 1) | `0.5` | a \\| b |" in block
    assert "| `users.path`, `items.path` | path or null | `null` | table |" in block  # same keys: one row
    assert "| `name` | str | required | column |" in block
    assert "| `sep` | str | `'\\|'` | delimiter |" in block


def test_write_replaces_only_the_block():
    text = f"head\n{config_table.BEGIN}\nold table\n{config_table.END}\ntail\n"
    new = config_table.with_block(text, "new table")
    assert new == f"head\n{config_table.BEGIN}\n\nnew table\n\n{config_table.END}\ntail\n"
    assert config_table.split_readme(new)[1] == "new table"
    with pytest.raises(ValueError):
        config_table.split_readme("no markers here")
