"""Pairs derived from a shop's own exports, out of core: items bought together in one basket, items
viewed together in one session, and an order export's repeated (customer, item) rows collapsed into one.

The embedded DuckDB engine reads the CSV or parquet export and does every join and count with a memory
limit (`interactions.derive_memory_gb`), spilling to a private temporary folder (under TMPDIR) beyond
it, so a 50M-line export derives in bounded memory. Only the results come back into numpy: one row per
derived pair (or collapsed row) as integer codes into the distinct ids.

The rules (`interactions.pairs_from`; a basket or session is one value of `group_column`):

* baskets: every basket adds 1 to each ordered pair (a, b) of two distinct items in it, both directions;
  with `quantity_column` it adds min(quantity of a, quantity of b), an item's lines in one basket
  summed first.
* sessions: a session adds 1 to (a, b), a != b, when some view of a and some view of b lie at most
  `session_minutes` apart (numeric times count as seconds).
* A basket or session holding more than `group_item_cap` distinct items keeps that many of them,
  chosen by a hash of (item, group, run.seed), so one huge order adds at most cap x (cap - 1) pairs
  and the self-join stays bounded.
* Honest splits: whole baskets or sessions are placed on a side first (random, or by their earliest
  time; `splits.global_sides`), and each side's pairs come from its own baskets only. A pair is kept on
  its earliest side: a validation pair also among the training pairs, or a test pair also among the
  training or validation pairs, is dropped with a counted note, since known pairs are excluded from
  the rankings that would have to rank it.
"""

from __future__ import annotations

import sys
import tempfile
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
from tqdm import tqdm

from towers.config import Config, InteractionsSection
from towers.data.splits import TRAIN, connected_units, global_sides
from towers.data.tables import TIME_FORM, normalise_ids, require_columns, table_columns, table_files
from towers.errors import TowersError, where

NUMERIC_TYPES = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT", "UINTEGER",
                 "UBIGINT", "FLOAT", "DOUBLE", "DECIMAL")
SIDE_NAMES = ("training", "validation", "test")


@dataclass
class DerivedPairs:
    """Derived pairs as codes into `ids`: query[r] -> candidate[r] with its count as weight, on side[r]."""

    query: np.ndarray  # int64 codes into ids
    candidate: np.ndarray  # int64 codes into ids
    ids: np.ndarray  # distinct item ids, int64 or str objects, sorted
    weight: np.ndarray  # float64 counts
    side: np.ndarray  # int8: TRAIN, VALID or TEST (splits.py)
    notes: list[str] = field(default_factory=list)


@dataclass
class CollapsedRows:
    """One row per distinct (query, candidate) of the export: codes into each side's distinct ids."""

    query: np.ndarray
    query_ids: np.ndarray
    candidate: np.ndarray
    candidate_ids: np.ndarray
    weight: np.ndarray  # float64: rows (or summed quantity) of the pair
    time: np.ndarray | None  # int64: the pair's latest time (ns for dates, numbers as given)
    group: np.ndarray | None  # int64 unit codes: orders linked by a shared pair are one unit
    notes: list[str] = field(default_factory=list)


def _ident(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _text(value: str) -> str:
    return "'" + value.replace("'", "''") + "'"


@contextmanager
def engine(memory_gb: float, threads: int):
    """A DuckDB connection limited to memory_gb, spilling into a private temporary folder removed afterwards."""
    import duckdb

    with tempfile.TemporaryDirectory(prefix="towers-pairs-") as spill:  # created 0700
        settings = {"memory_limit": f"{int(memory_gb * 1024)}MB", "temp_directory": spill,
                    "preserve_insertion_order": False}
        if threads:
            settings["threads"] = threads
        con = duckdb.connect(config=settings)
        try:
            yield con
        finally:
            con.close()


class Steps:
    """The derivation's stages: a tqdm bar on a terminal (or progress: bar), plain stderr lines otherwise."""

    def __init__(self, label: str, total: int, progress: str):
        self.label = label
        bar = progress == "bar" or (progress == "auto" and sys.stderr.isatty())
        self.bar = tqdm(total=total, desc=label, unit="step", leave=False, file=sys.stderr) if bar else None

    def done(self, what: str) -> None:
        if self.bar is None:
            print(f"{self.label}: {what}", file=sys.stderr, flush=True)
        else:
            self.bar.set_postfix_str(what)
            self.bar.update()

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


@contextmanager
def deriving(cfg: Config, label: str, stages: int, doing: str):
    """(DuckDB connection, Steps) for one derivation; an engine failure becomes one TowersError line."""
    steps = Steps(label, stages, cfg.training.progress)
    try:
        with engine(cfg.interactions.derive_memory_gb, cfg.run.threads) as con:
            yield con, steps
    except TowersError:
        raise
    except Exception as exc:
        if type(exc).__module__.startswith("duckdb"):
            first = str(exc).strip().splitlines()[0]
            raise TowersError(f"{cfg.interactions.path}: {doing} failed ({first}); check the file and the interactions "
                              "columns, or raise interactions.derive_memory_gb") from None
        raise
    finally:
        steps.close()


class Source:
    """The export as a DuckDB view `src` of checked, converted columns (g, i, q, t, w as configured).

    Every missing or unreadable value is an error naming the file, the column and the first bad row.
    """

    def __init__(self, con, path: str, columns: dict[str, str]):
        self.con, self.path = con, Path(path)
        self.files = table_files(self.path)  # one file, or a folder of files read as one table
        suffix = self.files[0].suffix.lower()
        lit = "[" + ", ".join(_text(str(f)) for f in self.files) + "]"
        if suffix in (".parquet", ".pq"):
            options = ""
            make = "read_parquet"
        else:
            # the header through pandas first: an empty file and a misnamed column get the usual one-line errors
            # (DuckDB refuses a quantity column named in `types` below that is not there with a message of its own)
            # (every file of a folder, so a day's export with another header is named, not a failed glob)
            for file in self.files:
                require_columns(table_columns(file), list(columns.values()), file)
            sep = "\\t" if suffix == ".tsv" else ","
            # quantities read as text and converted per row, so a bad value is named, not a failed sniff
            text = f", types = {{{_text(columns['w'])}: 'VARCHAR'}}" if "w" in columns else ""
            options = f", header = true, delim = E'{sep}'{text}"
            make = "read_csv"
        self.reader = f"{make}({lit}{options})"
        # the same rows with each one's file beside it, only to name the file of a bad row
        self.named_reader = f"{make}({lit}{options}, filename = true)"
        try:
            described = con.execute(f"DESCRIBE SELECT * FROM {self.reader}").fetchall()
        except Exception as exc:
            raise self._unreadable(exc) from None
        types = {str(r[0]).strip(): str(r[1]) for r in described}
        require_columns(list(types), list(columns.values()), self.path)
        self.columns, self.types = columns, types
        self.time_numeric = "t" in columns and types[columns["t"]].split("(")[0] in NUMERIC_TYPES
        exprs = {name: self._expression(name, col) for name, col in columns.items()}
        self.con.execute(f"CREATE TEMP VIEW src AS SELECT {', '.join(f'{e} AS {n}' for n, e in exprs.items())} "
                         f"FROM {self.reader}")
        self._check(exprs)

    def _unreadable(self, exc: Exception) -> TowersError:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        kind = self.files[0].suffix.lower()[1:]
        return TowersError(f"{self.path}: cannot be read as {kind} ({first}); check the file is a valid {kind} table")

    def _expression(self, name: str, column: str) -> str:
        col, kind = _ident(column), self.types[column].split("(")[0]
        if name == "t":
            if kind.startswith("TIMESTAMP") or kind == "DATE":
                return f"epoch_us({col})"
            if kind in NUMERIC_TYPES:
                return f"CAST({col} AS DOUBLE)"
            return f"epoch_us(TRY_CAST(trim({col}) AS TIMESTAMP))"  # trim(): no cast pushed into the reader
        if name == "w":  # a quantity; trim() keeps DuckDB from pushing the cast into the CSV reader, which fails
            return f"TRY_CAST(trim(CAST({col} AS VARCHAR)) AS DOUBLE)" if kind == "VARCHAR" else f"CAST({col} AS DOUBLE)"
        return col

    def _check(self, exprs: dict[str, str]) -> None:
        """One pass counting bad values per column; a second, ordered pass only to name the first bad row."""
        bad = {"g": "{e} IS NULL", "i": "{e} IS NULL", "q": "{e} IS NULL", "t": "{e} IS NULL",
               "w": "{e} IS NULL OR {e} < 0 OR isinf({e})"}
        conditions = {n: bad[n].format(e=n) for n in exprs if n in bad}
        try:
            counts = self.con.execute("SELECT " + ", ".join(f"count(*) FILTER (WHERE {c})" for c in conditions.values())
                                      + ", count(*) FROM src").fetchall()[0]
        except Exception as exc:
            raise self._unreadable(exc) from None
        if counts[-1] == 0:
            raise TowersError(f"{self.path}: the table has a header but no rows; export the data rows too")
        for (name, condition), n_bad in zip(conditions.items(), counts):
            if n_bad:
                self._raise_at(name, condition)

    def _raise_at(self, name: str, condition: str) -> None:
        column = self.columns[name]
        file, row, value = self._first_bad(_ident(column), condition)
        here = where(file, column, row)
        if value is None:
            what = {"g": "missing basket or session id; every row needs one (fill it, e.g. with the row's own order id)",
                    "i": "missing id; every row needs an id (drop or fill such rows)",
                    "q": "missing id; every row needs an id (drop or fill such rows)",
                    "t": "missing time; every row needs one (fill it or drop such rows)",
                    "w": "missing value; every row needs a number here"}[name]
        elif name == "t":
            what = f"{value!r} is not an ISO 8601 date or time; {TIME_FORM}"
        else:
            what = (f"negative or infinite quantity {value}; quantities must be finite and >= 0 (a return or refund "
                    "line: leave such lines out of the export, or net them against their order's purchase lines "
                    "first)" if _is_number(value) else f"{value!r} is not a number; quantities must be numbers >= 0")
        raise TowersError(f"{here}: {what}")

    def _first_bad(self, raw: str, condition: str) -> tuple[Path, int, str | None]:
        """The first bad row's file, its row in that file (from 1) and its raw value."""
        self.con.execute("SET preserve_insertion_order = true")  # row_number() in file order
        exprs = ", ".join(f"{e} AS {n}" for n, e in
                          ((n, self._expression(n, c)) for n, c in self.columns.items()))
        order = "CASE filename " + " ".join(f"WHEN {_text(str(f))} THEN {k}" for k, f in enumerate(self.files)) + " END"
        row = self.con.execute(
            f"SELECT filename, n, CAST(v AS VARCHAR) FROM (SELECT filename, row_number() OVER (PARTITION BY filename) "
            f"AS n, {raw} AS v, {exprs} FROM {self.named_reader}) WHERE {condition} ORDER BY {order}, n LIMIT 1"
        ).fetchall()[0]
        return Path(row[0]), int(row[1]), row[2]


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _distinct_codes(con, table: str, column: str, path, label: str) -> np.ndarray:
    """Number the distinct values of table.column in sorted order into a table `{table}_{column}_codes`
    (value, code); returns the values as int64 or str objects (normalise_ids' rules)."""
    name = f"{table}_{column}_codes"
    con.execute(f"CREATE TEMP TABLE {name} AS SELECT v, row_number() OVER (ORDER BY v) - 1 AS code "
                f"FROM (SELECT DISTINCT {column} AS v FROM {table})")
    values = con.execute(f"SELECT v FROM {name} ORDER BY code").fetchnumpy()["v"]
    return normalise_ids(pd.Series(values), path, label)


FETCH_ROWS = 1 << 20  # rows per batch when a result is read back: DuckDB never materialises it whole


def _fetch_sorted(con, sql: str, keys: tuple[str, ...]) -> dict[str, np.ndarray]:
    """The columns of a query's result as numpy arrays, read back in batches and sorted by `keys` in numpy.

    An ORDER BY would make DuckDB materialise the whole result inside its memory limit (it ran out at 50M
    order lines); batches of an unordered result stream out, and numpy sorts the arrays once they are here.
    """
    relation = con.sql(sql)
    reader = relation.to_arrow_reader(FETCH_ROWS) if hasattr(relation, "to_arrow_reader") else \
        relation.fetch_arrow_reader(FETCH_ROWS)  # the name before DuckDB 2
    parts: dict[str, list[np.ndarray]] = {name: [] for name in reader.schema.names}
    for batch in reader:
        for name, column in zip(batch.schema.names, batch.columns):
            parts[name].append(column.to_numpy(zero_copy_only=False))
    out = {}
    for name in list(parts):  # each column's batches freed as soon as they are joined, to keep the peak low
        chunks = parts.pop(name)
        out[name] = np.concatenate(chunks) if chunks else np.zeros(0)
        del chunks
    order = np.lexsort(tuple(out[k] for k in reversed(keys)))  # lexsort's last key is the primary one
    for name in out:  # one column at a time: the unsorted copy goes as its sorted one arrives
        out[name] = out[name][order]
    return out


def _cap_groups(con, cap: int, seed: int) -> int:
    """Replace `lines` by the lines of at most `cap` distinct items per group (a seeded hash picks which);
    returns how many groups were capped."""
    con.execute(f"CREATE TEMP TABLE big AS SELECT b FROM lines GROUP BY b HAVING count(DISTINCT i) > {cap}")
    n_big = con.execute("SELECT count(*) FROM big").fetchall()[0][0]
    if n_big:
        con.execute(f"""CREATE TEMP TABLE kept AS SELECT b, i FROM (SELECT DISTINCT l.b, l.i FROM lines l SEMI JOIN big
                        USING (b)) QUALIFY row_number() OVER (PARTITION BY b ORDER BY hash(i, b, {seed}), i) <= {cap}""")
        con.execute("""CREATE TEMP TABLE capped AS SELECT * FROM lines ANTI JOIN big USING (b)
                       UNION ALL SELECT l.* FROM lines l SEMI JOIN kept k ON l.b = k.b AND l.i = k.i""")
        con.execute("DROP TABLE lines")
        con.execute("ALTER TABLE capped RENAME TO lines")
    return int(n_big)


def derive_pairs(cfg: Config, split: bool) -> DerivedPairs:
    """Item -> item pairs counted in baskets or sessions (interactions.pairs_from), both directions.

    split: place whole baskets / sessions on training, validation and test first (evaluation.split,
    random or time) and derive each side's pairs from its own; False puts every basket on training.
    """
    ic, ev, seed = cfg.interactions, cfg.evaluation, cfg.run.seed
    sessions = ic.pairs_from == "sessions"
    what = "sessions" if sessions else "baskets"
    columns = {"g": ic.group_column, "i": ic.candidate_column}
    if ic.time_column:
        columns["t"] = ic.time_column
    if ic.quantity_column and not sessions:
        columns["w"] = ic.quantity_column
    with deriving(cfg, f"pairs from {what}", 5, f"deriving pairs from {what}") as (con, steps):
        source = Source(con, ic.path, columns)
        steps.done("export checked")
        when = "min(t)" if "t" in columns else "NULL"
        con.execute(f"CREATE TEMP TABLE groups AS SELECT g, {when} AS t, row_number() OVER (ORDER BY g) - 1 AS b "
                    "FROM src GROUP BY g")
        n_groups = con.execute("SELECT count(*) FROM groups").fetchall()[0][0]
        side = np.full(n_groups, TRAIN, dtype=np.int8)
        if split:
            t = con.execute("SELECT t FROM groups ORDER BY b").fetchnumpy()["t"] if "t" in columns else None
            t = None if t is None else np.asarray(t, dtype=np.float64)
            # a generator of its own: the cold items are drawn from seed + 1 in splits.make_split
            side = global_sides(n_groups, t, ev, np.random.default_rng(seed + 2)).astype(np.int8)
        con.register("group_sides", pa.table({"b": np.arange(n_groups, dtype=np.int64), "side": side}))
        per_side = np.bincount(side, minlength=3)
        steps.done(f"{n_groups:,} {what} placed")
        if sessions:
            con.execute("CREATE TEMP TABLE lines AS SELECT DISTINCT k.b, l.i, l.t FROM src l JOIN groups k USING (g)")
        else:
            amount = "sum(l.w)" if "w" in columns else "count(*)"
            con.execute(f"CREATE TEMP TABLE lines AS SELECT k.b, l.i, {amount} AS w FROM src l JOIN groups k "
                        "USING (g) GROUP BY k.b, l.i")
        capped = _cap_groups(con, ic.group_item_cap, seed)
        ids = _distinct_codes(con, "lines", "i", ic.path, ic.candidate_column)
        steps.done(f"{len(ids):,} items")
        if sessions:
            window = ic.session_minutes * (60.0 if source.time_numeric else 60e6)
            con.execute(f"""CREATE TEMP TABLE pairs AS SELECT s.side, p.a, p.c, count(*)::DOUBLE AS w, count(*) AS n FROM (
                              SELECT DISTINCT x.b, x.i AS a, y.i AS c FROM lines x JOIN lines y
                              ON x.b = y.b AND x.i <> y.i AND abs(x.t - y.t) <= {window!r}) p
                            JOIN group_sides s ON s.b = p.b GROUP BY ALL""")
        else:
            weight = "sum(least(x.w, y.w))" if "w" in columns else "count(*)"
            con.execute(f"""CREATE TEMP TABLE pairs AS SELECT s.side, x.i AS a, y.i AS c, {weight}::DOUBLE AS w,
                            count(*) AS n FROM lines x JOIN lines y ON x.b = y.b AND x.i <> y.i
                            JOIN group_sides s ON s.b = x.b GROUP BY ALL""")
        steps.done("pairs counted")
        con.execute("CREATE TEMP TABLE first_side AS SELECT a, c, min(side) AS first FROM pairs GROUP BY a, c")
        dropped = dict(con.execute("SELECT p.side, count(*) FROM pairs p JOIN first_side f USING (a, c) "
                                   "WHERE p.side > f.first GROUP BY p.side").fetchall())
        rare = 0
        if ic.min_pair_count > 1:  # training pairs only; placed after first_side, so the held-out drops are unchanged
            rare = con.execute(f"SELECT count(*) FROM pairs WHERE side = {TRAIN} AND n < {ic.min_pair_count}").fetchall()[0][0]
        out = _fetch_sorted(con, f"""SELECT ca.code AS a, cc.code AS c, p.w, p.side FROM pairs p
                                     JOIN first_side f ON p.a = f.a AND p.c = f.c AND p.side = f.first
                                     JOIN lines_i_codes ca ON ca.v = p.a JOIN lines_i_codes cc ON cc.v = p.c
                                     WHERE p.side <> {TRAIN} OR p.n >= {ic.min_pair_count}""", ("side", "a", "c"))
        steps.done(f"{len(out['a']):,} pairs kept")
    notes = [f"pairs from {what}: {n_groups:,} {what} of {ic.path} (training {per_side[0]:,}, validation "
             f"{per_side[1]:,}, test {per_side[2]:,}), {len(out['a']):,} item pairs (both directions)"]
    if capped:
        notes.append(f"pairs from {what}: {capped:,} {what} held more than group_item_cap = {ic.group_item_cap} "
                     "distinct items and kept a seeded sample of that many")
    if rare:
        notes.append(f"pairs from {what}: left out {rare:,} training pairs found in fewer than min_pair_count = "
                     f"{ic.min_pair_count} {what}")
    for s in (1, 2):
        if dropped.get(s):
            earlier = "training" if s == 1 else "training or validation"
            notes.append(f"pairs from {what}: dropped {dropped[s]:,} {SIDE_NAMES[s]} pairs also found among the "
                         f"{earlier} pairs (known pairs are excluded from rankings, so they could not be ranked)")
    return DerivedPairs(out["a"].astype(np.int64, copy=False), out["c"].astype(np.int64, copy=False), ids,
                        out["w"].astype(np.float64, copy=False), out["side"].astype(np.int8, copy=False), notes)


def collapse_repeats(cfg: Config) -> CollapsedRows:
    """One row per distinct (query, candidate) of the export (interactions.count_repeats): weight = its rows
    (or summed quantity_column), time = its latest. With group_column, the orders holding one pair and the
    pairs of one order are joined into one unit (connected components), so no order and no pair spans
    two sides of the split."""
    ic: InteractionsSection = cfg.interactions
    columns = {"q": ic.query_column, "i": ic.candidate_column}
    for name, column in (("t", ic.time_column), ("g", ic.group_column), ("w", ic.quantity_column)):
        if column:
            columns[name] = column
    amount = "sum(w)" if "w" in columns else "count(*)"
    latest = ", max(t) AS t" if "t" in columns else ""
    by = "q, i, g" if "g" in columns else "q, i"
    with deriving(cfg, "counting repeated rows", 1, "counting repeated rows") as (con, steps):
        source = Source(con, ic.path, columns)
        con.execute(f"CREATE TEMP TABLE rows AS SELECT {by}, {amount}::DOUBLE AS w{latest} FROM src GROUP BY {by}")
        q_ids = _distinct_codes(con, "rows", "q", ic.path, ic.query_column)
        c_ids = _distinct_codes(con, "rows", "i", ic.path, ic.candidate_column)
        group = ", gc.code AS g" if "g" in columns else ""
        join_g = " JOIN (SELECT g, row_number() OVER (ORDER BY g) - 1 AS code FROM (SELECT DISTINCT g FROM rows)) gc " \
                 "ON gc.g = r.g" if "g" in columns else ""
        out = _fetch_sorted(con, f"""SELECT qc.code AS q, cc.code AS c, r.w{', r.t' if latest else ''}{group}
                                     FROM rows r JOIN rows_q_codes qc ON qc.v = r.q
                                     JOIN rows_i_codes cc ON cc.v = r.i{join_g}""", ("q", "c", "g") if group else ("q", "c"))
        n_rows = con.execute("SELECT count(*) FROM src").fetchall()[0][0]
        steps.done(f"{n_rows:,} rows read")
    q, c, w = out["q"].astype(np.int64), out["c"].astype(np.int64), out["w"].astype(np.float64)
    t = None
    if latest:
        t = out["t"].astype(np.float64)
        t = t.astype(np.int64) if source.time_numeric else t.astype(np.int64) * 1000  # microseconds to ns
    unit = None
    if "g" in columns:  # rows are (pair, order) here, sorted by pair: collapse them after joining units
        starts = np.r_[True, (q[1:] != q[:-1]) | (c[1:] != c[:-1])]
        pair, pair_of_row = np.flatnonzero(starts), np.cumsum(starts) - 1
        component = connected_units(pair_of_row, out["g"].astype(np.int64))
        w = np.bincount(pair_of_row, weights=w)
        if t is not None:
            t = np.maximum.reduceat(t, pair)
        unit, q, c = component[pair], q[pair], c[pair]
    notes = [f"count_repeats: {n_rows:,} rows of {ic.path} became {len(q):,} rows, one per distinct pair, "
             "weighted by " + ("summed quantity" if "w" in columns else "their number")]
    if unit is not None:
        notes.append(f"count_repeats: {len(np.unique(out['g'])):,} orders joined into {int(unit.max(initial=-1)) + 1:,} "
                     "split units (orders sharing a repeated pair stay on one side)")
    return CollapsedRows(q, q_ids, c, c_ids, w, t, unit, notes)
