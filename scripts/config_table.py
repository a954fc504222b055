"""Print the README's config-key tables from the declarations in towers/config.py (one source of truth)."""

from towers.config import FEATURE_KEYS, SCHEMA


def _fmt(key) -> str:
    kind = {"int_list": "list of int", "str_or_int_list": "list of ids", "features": "list of feature specs", "choice": " / ".join(key.choices)}.get(key.kind, key.kind)
    if key.nullable and key.kind != "choice":
        kind += " or null"
    default = "required" if key.default is None and not key.nullable and key.kind != "features" else repr(key.default)
    bounds = []
    if key.low is not None:
        bounds.append(f"{'>' if key.low_open else '>='} {key.low:g}")
    if key.high is not None:
        bounds.append(f"<= {key.high:g}")
    rng = f" ({', '.join(bounds)})" if bounds else ""
    return f"{kind}{rng} | {default.replace('|', chr(92) + '|')}"


def main() -> None:
    for section, keys in list(SCHEMA.items()) + [("feature spec (entries of users/items.features)", FEATURE_KEYS)]:
        print(f"#### `{section}`\n")
        print("| key | type | default | meaning |")
        print("|---|---|---|---|")
        for name, key in keys.items():
            meaning = key.meaning.replace("|", "\\|")
            print(f"| `{name}` | {_fmt(key)} | {meaning} |")
        print()


if __name__ == "__main__":
    main()
