"""A trained run folder in use: embed unseen entities, recommend, find similar items, re-evaluate."""

from __future__ import annotations

import copy
import dataclasses
import re
import warnings
import zipfile
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd
import torch

from towers.atomic import write_atomic
from towers.data.context import (
    AveragedOverContexts,
    ContextEncoders,
    vectors_with_context,
)
from towers.data.embeddings_file import (
    embeddings_table,
    read_embeddings,
    true_vectors,
    write_embeddings,
)
from towers.data.features import SideEncoders
from towers.data.groups import group_labels
from towers.data.history import HISTORY, empty_history, history_bags, history_column, history_ids, trained_items
from towers.data.pairs import Pairs
from towers.data.prepare import read_interactions
from towers.data.tables import (
    align_id_types,
    check_unique_ids,
    given_ids,
    normalise_ids,
    padded_form,
    positions_in,
    read_table,
    read_table_chunks,
    require_columns,
    table_columns,
    table_rows,
    zero_padded,
)
from towers.errors import TowersError, plain
from towers.evaluation.protocol import evaluate_slices, oracle_scorer, popularity_scorer, reference_scorers
from towers.model.bundle import load_bundle
from towers.model.embed import EMBED_CHUNK, reads_history
from towers.model.towers import whole_bias
from towers.runs import lists as L
from towers.runs.folder import EMBEDDINGS, SUBFOLDER_MODELS, TOWERS, RunFolder
from towers.search.scorer import Scorer, excluded_cells

# how an id the run never saw can still be asked about (the README's recommend and similar options)
UNSEEN_USERS = "; a user the run never saw is asked for by a few item ids (--history) or feature rows (--user-rows)"
UNSEEN_ITEMS = "; items the run never saw join the lists from their feature rows (--new-items, or --item-rows)"
_NO_MATCH = np.iinfo(np.int64).min  # what align_id_types gives text that is not a whole number


def _rows_in_file(exc: TowersError, source, start: int) -> TowersError:
    """An error about row r of a piece that starts at row `start` of the file, renumbered to the file's row."""
    if not start:
        return exc
    text = str(exc)
    pattern = re.compile(re.escape(str(source)) + r"(, column '.*?')?, row (\d+)")
    found = pattern.match(text)
    if not found:
        return exc
    head = text[:found.start(2)]
    return TowersError(f"{head}{int(found.group(2)) + start}{text[found.end(2):]}")


def _column_label(source, column: str) -> str:
    return str(source) if column == HISTORY else f"{source}, column '{column}'"


def _left_out(counts: dict, separator: str | None = None) -> str:
    """Words for the history ids left out: those not in the run (the first named; for text read with
    `separator`, a hint when it looks like several ids joined by another), and those no training history held."""
    parts = []
    n, m = counts["unknown"], counts["untrained"]
    if n:
        first = counts.get("first_unknown")
        shown_id = "" if first is None else f" (e.g. {plain(first)!r}"
        joined = [c for c in (";", ",", "|", "/", "\t") if c != separator and c in str(first)] \
            if first is not None and separator is not None else []
        if joined and shown_id:
            shown_id += f": ids joined by {joined[0]!r}? set the history separator to it"
        parts.append(f"{n} item id{'s' if n != 1 else ''} not in this run's items{shown_id}{')' if shown_id else ''}")
    if m:
        parts.append(f"{m} item{'s' if m != 1 else ''} that no training history held (their history rows never "
                     "learned)")
    return " and ".join(parts)


def _check_archive(path: Path, kind: str) -> None:
    """torch.save writes a zip archive; anything else (garbage, a cut-off copy) is damaged, not unsafe."""
    if path.is_file() and not zipfile.is_zipfile(path):
        raise TowersError(f"{path}: {kind} is corrupt or truncated (not a torch archive); retrain or restore the file")


class Run:
    """A trained run folder: its model bundle, exported embeddings and split pairs."""

    def __init__(self, run_dir: str | Path):
        self.folder = RunFolder(run_dir)
        self.dir = self.folder.path
        model_file = self.folder.model_file()
        if not model_file.is_file():
            raise TowersError(f"{self.dir}: not a run folder (no {model_file.name}); give the --out folder of "
                              "`towers train`")
        _check_archive(model_file, "model bundle")
        self.bundle = load_bundle(model_file)
        self.config = self.folder.read_config() if self.folder.has_config() else None
        self.item_item = self.bundle.item_item
        self._pairs = None
        self._emb = {}
        self._history_cache = None
        self.item_table_cache = {}  # lists.py: the item table that columns and filters read, kept while unchanged
        self.new_item_rows: pd.DataFrame | None = None  # with_new_items: the feature rows of the items added

    # ---- saved state -------------------------------------------------------------------------
    @property
    def pairs(self) -> dict:
        if self._pairs is None:
            _check_archive(self.folder.file(RunFolder.PAIRS), "pairs file")
            self._pairs = self.folder.read_pairs_payload()
        return self._pairs

    def embeddings(self, side: str, model: str = TOWERS) -> tuple[np.ndarray, torch.Tensor, torch.Tensor | None, dict]:
        """(ids, vectors, bias, metadata) of an exported embeddings file: side 'item', 'user' or 'query'."""
        if side not in EMBEDDINGS:
            raise TowersError(f"{self.dir}: no embeddings side {side!r}; give 'item', 'user' or 'query'")
        key = (side, model)
        if key not in self._emb:
            self._emb[key] = read_embeddings(self.folder.embeddings_file(side, model))
        return self._emb[key]

    def _query_side(self) -> str:
        return "query" if self.item_item else "user"

    def with_new_items(self, rows: pd.DataFrame | str | Path, source: str | None = None) -> "Run":
        """This run with items it has never seen added to its catalog: each row (a DataFrame, or a CSV or parquet
        file whose ids are read as written) with the id column and the run's item feature columns, as
        embed_items reads them, embedded from its features alone, as `embed` embeds it. recommend, similar and
        the lists of the returned Run rank them beside the run's items (in an item_item run they are queries
        too, through the query tower), and item columns the item table lacks for them are read from these rows.
        Rows naming an item of the run keep its trained vector (a warning counts them); the run folder is not
        changed."""
        ids, vectors, bias, meta = self.embeddings("item")
        id_column = self.bundle.candidate_encoders.id_column
        if isinstance(rows, (str, Path)):
            source = source or str(rows)
            rows = read_table(rows, ids=[id_column] if id_column else ())
        source = source or "new items"
        if not isinstance(rows, pd.DataFrame):
            raise TowersError(f"{source}: expected a table of item feature rows (a pandas DataFrame or a file), got "
                              f"{type(rows).__name__}")
        if id_column is not None and id_column not in rows.columns:
            raise TowersError(f"{source}: new items need their ids in a column {id_column!r} (the run's item id "
                              "column), so lists can name them")
        df = rows.reset_index(drop=True)
        added = self.embed_items(df, source)
        new_ids = added["id"].to_numpy()
        if ids.dtype.kind in "iu" and new_ids.dtype.kind not in "iu" and len(new_ids):
            raise TowersError(f"{source}: this run's item ids are whole numbers, but {plain(new_ids[0])!r} is not; "
                              "give new items whole-number ids")
        check_unique_ids(new_ids, source, id_column)
        fresh = positions_in(ids, new_ids) < 0
        if not fresh.all():
            first = plain(new_ids[np.flatnonzero(~fresh)[0]])
            warnings.warn(f"{source}: {int((~fresh).sum())} of the {len(new_ids)} rows are items of this run already "
                          f"(e.g. {first!r}); they keep their trained vectors", stacklevel=2)
        keep = torch.from_numpy(np.flatnonzero(fresh))
        joined = np.concatenate([ids, new_ids[fresh].astype(ids.dtype)])  # the catalog's id type (checked above)

        def extended(side_vectors, side_bias, more_vectors, more_bias):  # biases both or neither: one model
            return (torch.cat([side_vectors, more_vectors.index_select(0, keep)]),
                    None if side_bias is None else torch.cat([side_bias, more_bias.index_select(0, keep)]))

        view = copy.copy(self)  # the bundle, config and pairs shared; the embeddings and caches its own
        view._emb = dict(self._emb)
        view.item_table_cache = {}
        view._history_cache = None
        rows_added = df.iloc[np.flatnonzero(fresh)].copy()
        if id_column is not None:  # the ids as the catalog holds them (an int id given to a text run is its text)
            rows_added[id_column] = pd.Series(new_ids[fresh], index=rows_added.index, dtype=object)
        view.new_item_rows = rows_added if self.new_item_rows is None else \
            pd.concat([self.new_item_rows, rows_added], ignore_index=True)
        view._emb[("item", TOWERS)] = (joined, *extended(vectors, bias, added.attrs["vectors"], added.attrs["bias"]),
                                       meta)
        if self.item_item:  # the new items as queries: the query tower on the same rows (a shared tower's is the item)
            q_ids, q_vectors, q_bias, q_meta = self.embeddings("query")
            m = self.bundle.model
            if m.shared:
                view._emb[("query", TOWERS)] = view._emb[("item", TOWERS)]
            else:
                enc = self.bundle.query_encoders
                asked = self._embed(df, enc, m.query_tower, m.query_bias if m.use_biases else None, source)
                view._emb[("query", TOWERS)] = (joined, *extended(q_vectors, q_bias, asked.attrs["vectors"],
                                                                  asked.attrs["bias"]), q_meta)
        return view

    # ---- embedding unseen entities ----------------------------------------------------------------
    def _embed(self, df: pd.DataFrame, encoders: SideEncoders, tower, bias_table, source: str,
               history: tuple[str, str] | None = None) -> pd.DataFrame:
        self._check_embeddable(encoders, source)
        self._check_history(history)
        wanted = [encoders.id_column] + [e.name for e in encoders.encoders] + ([history[0]] if history else [])
        require_columns(df.columns, wanted, source)
        if len(df) == 0:
            raise TowersError(f"{source}: no rows to embed")
        ids, lookup = self._embed_ids(df[encoders.id_column], encoders, source)
        frame = df.reset_index(drop=True)
        pieces = ((i, frame.iloc[i:i + EMBED_CHUNK]) for i in range(0, len(frame), EMBED_CHUNK))
        parts = list(self._embed_pieces(pieces, lookup, encoders, tower, bias_table, source, history))
        vecs = torch.cat([v for _, v, _ in parts])
        bias = torch.cat([b for _, _, b in parts]) if bias_table is not None else None
        out = pd.DataFrame({"id": ids, "embedding": list(vecs.numpy())})
        if bias is not None:
            out["bias"] = bias.numpy()
        out.attrs["vectors"], out.attrs["bias"] = vecs, bias
        return out

    def _check_history(self, history: tuple[str, str] | None) -> None:
        """Refuse a history when the query tower reads none, before any row is read."""
        if history is not None and not reads_history(self.bundle.model.query_tower):
            raise TowersError(f"{self.dir}: this run was trained without user histories (model.history_length is 0), "
                              "so it cannot read one; drop the history (--history-column, history= or a request's "
                              "\"history\"), or retrain with model.history_length > 0")

    def _run_histories(self) -> tuple[np.ndarray, torch.Tensor, int]:
        """(the run's item ids, every catalog user's training bag, the history length), built once per Run."""
        if self._history_cache is None:
            _check_archive(self.folder.file(RunFolder.PAIRS), "pairs file")
            saved = self.folder.read_pairs()
            limit = self.bundle.model_cfg.history_length
            bags = history_column(saved.split.train, len(saved.query_ids), len(saved.item_ids), limit)
            self._history_cache = (saved.item_ids, bags, limit)
        return self._history_cache

    def _history_catalog(self) -> tuple[np.ndarray, torch.Tensor, int]:
        """(the run's item ids, which of them some training history holds, the history length)."""
        item_ids, bags, limit = self._run_histories()
        return item_ids, trained_items(bags, len(item_ids)), limit

    def _check_embeddable(self, encoders: SideEncoders, source) -> None:
        if encoders.id_column is None:
            side = "items" if encoders is self.bundle.candidate_encoders else "users"
            raise TowersError(f"{source}: this run was trained without a {side} table, so new {side} cannot be "
                              f"embedded from feature rows; train with one ({side}.path and {side}.features)")

    @staticmethod
    def _embed_ids(column: pd.Series, encoders: SideEncoders, source) -> tuple[np.ndarray, np.ndarray]:
        """(ids as they are written out, ids as the run's id encoder looks them up) for a whole id column."""
        ids = normalise_ids(column, source, encoders.id_column)
        lookup = align_id_types(ids, encoders.id_encoder.ids) if len(encoders.id_encoder.ids) else ids
        if lookup.dtype == ids.dtype or not (lookup == _NO_MATCH).any():
            ids = lookup  # the run's id type, where every id converts
        # else: text ids that are no whole numbers are new entities; they keep their own text as id
        return ids, lookup

    def _embed_pieces(self, pieces, lookup: np.ndarray, encoders: SideEncoders, tower, bias_table, source,
                      history: tuple[str, str] | None = None):
        """Yield (first row, vectors, bias or None) for each (first row, feature frame) piece of a table.

        Pieces are encoded and embedded one at a time, so memory holds one piece's encoded block,
        whatever the table's length. Counts of values unseen in training, and of history ids left out,
        are summed over the pieces and reported in one warning each at the end. history = (column,
        separator): each row's item ids (history.py); without it a tower that reads histories gets
        empty ones (features alone).
        """
        unknown: dict[str, int] = {}
        left_out = {"unknown": 0, "untrained": 0, "first_unknown": None}
        tower.eval()
        for start, frame in pieces:
            try:
                block = encoders.encode(lookup[start:start + len(frame)], frame.reset_index(drop=True), source)
                if history is not None:
                    block[HISTORY], counts = self._bags(frame[history[0]], source, history)
                    left_out["unknown"] += counts["unknown"]
                    left_out["untrained"] += counts["untrained"]
                    if left_out["first_unknown"] is None:  # the first piece's to show
                        left_out["first_unknown"] = counts.get("first_unknown")
            except TowersError as exc:
                raise _rows_in_file(exc, source, start) from None
            for name, count in encoders.unknown_counts().items():
                unknown[name] = unknown.get(name, 0) + count
            if history is None and reads_history(tower):  # no history given: features alone
                block[HISTORY] = empty_history(len(frame))
            with torch.no_grad():
                encoded = tower.encode(block)
                bias = whole_bias(bias_table(block["id"]).squeeze(1), encoded) if bias_table is not None else None
            yield start, encoded.vectors, bias
        if unknown:
            listed = ", ".join(f"{k}: {v}" for k, v in unknown.items())
            warnings.warn(f"{source}: values unseen in training were mapped to the unknown bucket ({listed})", stacklevel=4)
        if history is not None and (left_out["unknown"] or left_out["untrained"]):
            warnings.warn(f"{_column_label(source, history[0])}: left out of the histories "
                          f"{_left_out(left_out, None if history[0] == HISTORY else history[1])}",
                          stacklevel=4)

    def _bags(self, column: pd.Series, source, history: tuple[str, str]) -> tuple[torch.Tensor, dict[str, int]]:
        """History bags of some rows (item rows + 1, 0 padding) and the counts of ids left out."""
        item_ids, trained, limit = self._history_catalog()
        ids, rows = history_ids(column, source, history[0], history[1])
        return history_bags(ids, rows, len(column), item_ids, trained, limit)

    def _side_parts(self, side: str):
        """(encoders, tower, bias table) that embed new rows of one side: 'items' or 'users'."""
        m = self.bundle.model
        if side == "items":
            return self.bundle.candidate_encoders, m.candidate_tower, m.candidate_bias if m.use_biases else None
        if self.item_item:
            raise TowersError("this run is item_item: it has no user tower; embed items instead "
                              "(towers embed RUN --items FILE, or Run.embed_items in Python)")
        tower = m.query_tower
        if self.context is not None:
            tower = AveragedOverContexts(m.query_tower, self.bundle.extra["context_sample"])
        return self.bundle.query_encoders, tower, m.query_bias if m.use_biases else None

    def embed_file(self, source: str | Path, out: str | Path, side: str = "items", history_column: str | None = None,
                   separator: str = "|") -> int:
        """Embed every row of a feature table file into an embeddings parquet; returns the row count.

        A parquet table is read, encoded, embedded and written EMBED_CHUNK rows at a time, so memory
        stays bounded however many rows it has (a CSV table is read whole first). The output is
        written atomically, in the format of the run's own embeddings files. `side`: items or users.
        history_column (users of a run with model.history_length > 0): the column holding each user's
        item ids, a list or text joined by `separator`, the last the latest (see embed_users).
        """
        import pyarrow.parquet as pq

        if history_column is not None and side != "users":
            raise TowersError(f"{source}: --history-column gives users' histories; use it with --users, not --items")
        encoders, tower, bias_table = self._side_parts(side)
        self._check_embeddable(encoders, source)
        history = None if history_column is None else (history_column, separator)
        self._check_history(history)
        names = [e.name for e in encoders.encoders] + ([history_column] if history_column else [])
        _, vectors, bias, item_meta = self.embeddings("item")
        meta = dict(item_meta, side="item" if side == "items" else "user", source=str(source))
        parquet = Path(source).suffix.lower() in (".parquet", ".pq")
        head = read_table(source, columns=[encoders.id_column] if parquet else None, ids=[encoders.id_column],
                          empty_ok=True)
        if not len(head):  # a night with no new items: an empty file, so the job downstream runs as usual
            require_columns(table_columns(source), [encoders.id_column] + names, source)
            warnings.warn(f"{source}: the table has a header but no rows; {out} holds no vectors", stacklevel=2)
            write_embeddings(out, np.asarray(encoders.id_encoder.ids)[:0], torch.zeros(0, vectors.shape[1]),
                             None if bias is None else torch.zeros(0), meta)
            return 0
        if not parquet:
            df = head
            result = self._embed(df, encoders, tower, bias_table, source, history)
            write_embeddings(out, result["id"].to_numpy(), result.attrs["vectors"], result.attrs["bias"], meta)
            return len(result)
        ids, lookup = self._embed_ids(head[encoders.id_column], encoders, source)
        n = len(ids)
        if names:
            pieces = read_table_chunks(source, names, EMBED_CHUNK)
        else:
            pieces = ((i, pd.DataFrame(index=pd.RangeIndex(min(n, i + EMBED_CHUNK) - i))) for i in range(0, n, EMBED_CHUNK))

        def write(path: Path) -> None:
            writer = None
            try:
                for start, vecs, bias in self._embed_pieces(pieces, lookup, encoders, tower, bias_table, source,
                                                            history):
                    table = embeddings_table(ids[start:start + len(vecs)], vecs, bias, meta)
                    if writer is None:
                        writer = pq.ParquetWriter(path, table.schema)
                    writer.write_table(table)
            finally:
                if writer is not None:
                    writer.close()

        write_atomic(out, write)
        return n

    def embed_items(self, df: pd.DataFrame, source: str = "items") -> pd.DataFrame:
        """Embed item rows (id column plus feature columns) with the candidate tower."""
        return self._embed(df, *self._side_parts("items"), source)

    def embed_users(self, df: pd.DataFrame, source: str = "users", history=None, history_column: str | None = None,
                    separator: str = "|") -> pd.DataFrame:
        """Embed user rows (id column plus feature columns) with the query tower.

        A run trained with model.history_length > 0 also reads each user's items: `history`, one list of
        item ids per row of df (in the order given, the last the latest; an empty list for none), or
        `history_column`, a column of df holding such lists or text of ids joined by `separator`. Ids
        not among the run's items, and items no training history held, are left out with a warning
        counting them; each item counts once, and the latest model.history_length are used. Without
        a history such a run embeds users from features alone (an empty history).

        A run with context columns gives each user's vector averaged over the training context sample
        saved in its bundle, as user_embeddings.parquet does.
        """
        if history is not None and history_column is not None:
            raise TowersError(f"{source}: give the history either as lists (history=) or as a column (history_column=), "
                              "not both")
        if history is not None:
            if isinstance(history, (str, bytes)) or not hasattr(history, "__len__"):
                raise TowersError(f"{source}: history= takes one list of item ids per user row, got "
                                  f"{type(history).__name__}; pass e.g. [[12, 40], [], [7]]")
            if len(history) != len(df):
                raise TowersError(f"{source}: history= has {len(history)} lists for {len(df)} user rows; give one list "
                                  "of item ids per row (an empty list for a user with none)")
            df = df.assign(**{HISTORY: pd.Series(list(history), index=df.index, dtype=object)})
            history_column = HISTORY
        spec = None if history_column is None else (history_column, separator)
        return self._embed(df, *self._side_parts("users"), source, spec)

    # ---- context ----------------------------------------------------------------------------------
    @property
    def context(self) -> ContextEncoders | None:
        """Encoders of the run's context columns, or None when its query tower reads none."""
        state = self.bundle.extra.get("context")
        return ContextEncoders.from_state(state) if state else None

    def _user_block(self, rows: torch.Tensor) -> dict:
        """Encoded features of catalog users (rows), and their training history when the tower reads one."""
        block = self._user_features(rows)
        if reads_history(self.bundle.model.query_tower):
            block[HISTORY] = self._run_histories()[1].index_select(0, rows)
        return block

    def _user_features(self, rows: torch.Tensor) -> dict:
        """Encoded features of catalog users (rows), read from the run's user feature table."""
        enc = self.bundle.query_encoders
        ids = self.embeddings(self._query_side())[0][rows.numpy()]
        if not enc.encoders:
            return {"id": enc.id_encoder.transform(ids)}
        ucfg = self.config.users
        table = read_table(ucfg.path, ids=[ucfg.id_column])
        require_columns(table.columns, [ucfg.id_column] + [e.name for e in enc.encoders], ucfg.path)
        at = table_rows(normalise_ids(table[ucfg.id_column], ucfg.path, ucfg.id_column), ids)
        if (at < 0).any():
            bad = ids[np.flatnonzero(at < 0)[0]]
            raise TowersError(f"{ucfg.path}, column '{ucfg.id_column}': user {bad!r} has no row any more; "
                              "restore the user feature table the run was trained with")
        rows_df = table.iloc[at].reset_index(drop=True)
        return enc.encode(ids, rows_df, ucfg.path)

    def _context_block(self, context: dict, n: int) -> dict:
        """One context (column -> value) encoded n times; columns not given count as missing."""
        enc = self.context
        unknown = [k for k in context if k not in enc.names]
        if unknown:
            raise TowersError(f"{self.dir}: unknown context column {unknown[0]!r}; this run's context columns are "
                              f"{', '.join(enc.names)}")
        frame = pd.DataFrame({name: pd.Series([context.get(name)] * n, dtype=object) for name in enc.names})
        block = enc.encode(frame, "context")
        unseen = [f"{name}={context[name]!r}" for name, count in enc.unknown_counts().items()
                  if count and context.get(name) is not None]
        if unseen:  # the unknown bucket: the model scores as for a value it never learned
            warnings.warn(f"context: {', '.join(unseen)} never seen in training; scored as an unknown value",
                          stacklevel=3)
        return block

    # ---- retrieval ------------------------------------------------------------------------------
    def _rows(self, ids_all: np.ndarray, wanted, what: str) -> torch.Tensor:
        """Catalog rows of requested ids, parsed the same way as log ids are matched to tables."""
        given = given_ids(wanted)
        wanted = align_id_types(given, ids_all)
        if ids_all.dtype.kind in "iu":
            unparsed = wanted == np.iinfo(np.int64).min  # align_id_types' mark for text that is no whole number
            if unparsed.any():
                bad = given[np.flatnonzero(unparsed)[0]]
                if zero_padded(np.asarray([bad], dtype=object))[0]:
                    raise TowersError(f"{self.dir}: {what} id {bad!r} is written with a leading zero or sign, but this "
                                      f"run's {what} ids are whole numbers as they print; give it as {int(str(bad))}")
                raise TowersError(f"{self.dir}: {what} id {bad!r} is not a number, but this run's {what} ids are "
                                  "numbers; give the id as a whole number")
        rows = pd.Index(ids_all).get_indexer(wanted)
        if (rows < 0).any():
            bad = wanted[np.flatnonzero(rows < 0)[0]]
            bad = plain(bad)
            plural = "queries" if what == "query" else f"{what}s"
            found = padded_form(np.asarray([bad], dtype=object), ids_all)
            fix = (f"the run's ids keep leading zeros: give it as {found[1]!r}" if found else
                   "check the id" + (UNSEEN_USERS if what == "user" else UNSEEN_ITEMS))
            raise TowersError(f"{self.dir}: unknown {what} id {bad!r}: not in this run's catalog ({len(ids_all):,} {plural}); "
                              f"{fix}")
        return torch.from_numpy(rows.astype(np.int64))

    def known_pairs(self) -> tuple[torch.Tensor, torch.Tensor]:
        """(query rows, item rows) of the pairs a list leaves out: each user's training and validation pairs. An
        item_item run leaves out none (only the query item itself): the items bought or viewed with an item are
        what its list is for."""
        if self.item_item:
            none = torch.zeros(0, dtype=torch.int64)
            return none, none
        tr, va = self.pairs["train"], self.pairs["valid"]
        return torch.cat([tr["query"], va["query"]]), torch.cat([tr["candidate"], va["candidate"]])

    def recommend(self, user_ids, top: int = 10, exclude_known: bool = True, context: dict | None = None,
                  columns: Sequence[str] = (), keep: L.ItemFilter | None = None, item_table=None) -> pd.DataFrame:
        """Top items per user (query_id, rank, item_id, score, then `columns`); the user's training and
        validation pairs excluded (in item_item runs only the query item itself, as similar and lists do:
        the items seen with it are what its list is for); exclude_known=False excludes nothing.

        context: {column: value} for runs with context columns; without it the users' exported
        vectors (averaged over the training context mix) are used. columns: item table columns added
        to each listed item; keep: an ItemFilter applied inside the top-N; item_table: the table both
        read (default: the run's config items.path). See lists.py.
        """
        L.check_top(self, top)
        if context and self.context is None:
            raise TowersError(f"{self.dir}: this run was trained without context columns; drop the context (--context, "
                              "context= or a request's \"context\")")
        q_ids = self.embeddings(self._query_side())[0]
        rows = self._rows(q_ids, pd.unique(given_ids(user_ids).astype(object)), "query" if self.item_item else "user")
        rows = torch.from_numpy(pd.unique(rows.numpy()))  # ' 7' and '7' name one user: one list, in first-asked order
        lists = L.lists_for(self, columns, keep, item_table)
        vectors = None
        if context:
            with torch.no_grad():
                vectors = self.bundle.model.query_tower(self._user_block(rows) | self._context_block(context, len(rows)))
        ex_r = ex_c = None
        if exclude_known:
            known_q, known_c = self.known_pairs()
            ex_r, ex_c = excluded_cells(rows, [(known_q, known_c)], exclude_self=self.item_item)
        idx, scores = lists.top(self._scorer(TOWERS).for_queries(rows, vectors), top, ex_r, ex_c)
        return lists.frame(q_ids[rows.numpy()], idx, scores)

    def recommend_history(self, item_ids, top: int = 10, context: dict | None = None, columns: Sequence[str] = (),
                          keep: L.ItemFilter | None = None, item_table=None) -> pd.DataFrame:
        """Top items (query_id, rank, item_id, score) for a new user known only by a few items.

        The user's vector is the query tower's on an empty feature row (every feature missing, the id
        unknown, as the encoders treat values they never saw) plus this history (item ids, the last
        the latest; embed_users' rules). The given items that are in the run are excluded from the
        ranking. query_id is "(history)". Needs a run trained with model.history_length > 0. columns,
        keep, item_table: as recommend.
        """
        L.check_top(self, top)
        if self.item_item:
            raise TowersError(f"{self.dir}: this run is item_item: it has no user tower; use similar for items")
        if context and self.context is None:
            raise TowersError(f"{self.dir}: this run was trained without context columns; drop the context (--context, "
                              "context= or a request's \"context\")")
        items = list(item_ids)
        if not items:
            raise TowersError(f"{self.dir}: a history needs at least one item id")
        history = (HISTORY, "|")
        self._check_history(history)
        lists = L.lists_for(self, columns, keep, item_table)
        encoders, tower, bias_table = self._side_parts("users")
        frame = pd.DataFrame({e.name: pd.Series([None], dtype=object) for e in encoders.encoders})
        frame[HISTORY] = pd.Series([items], dtype=object)
        block = encoders.encode(np.asarray([None], dtype=object), frame, "history")  # no id: the unknown row
        block[HISTORY], counts = self._bags(frame[HISTORY], "history", history)
        if counts["unknown"] or counts["untrained"]:
            warnings.warn(f"history: left out {_left_out(counts)}", stacklevel=2)
        # without --context a run with context columns averages over its training context sample, as embed_users
        query = (lambda b: self.bundle.model.query_tower(b | self._context_block(context, 1))) if context else tower
        with torch.no_grad():
            vectors = query(block)
            bias = bias_table(block["id"]).squeeze(1) if bias_table is not None else None
        i_ids = self.embeddings("item")[0]  # the catalog order of pairs.pt and of the history table
        ids, _ = history_ids(frame[HISTORY], "history", HISTORY)
        at = positions_in(i_ids, ids)
        given = torch.from_numpy(np.unique(at[at >= 0]).astype(np.int64))  # the given items in the run, left out
        scorer = dataclasses.replace(self._scorer(TOWERS), query_vectors=vectors, query_bias=bias)
        idx, scores = lists.top(scorer, top, torch.zeros(len(given), dtype=torch.int64), given)
        return lists.frame(["(history)"], idx, scores)

    def similar(self, item_ids, top: int = 10, columns: Sequence[str] = (), keep: L.ItemFilter | None = None,
                item_table=None) -> pd.DataFrame:
        """Most similar items (query_id, rank, item_id, score, then `columns`), the item itself excluded.

        user_item runs: cosine similarity of item embeddings. item_item runs: the trained pair score.
        columns, keep, item_table: as recommend.
        """
        L.check_top(self, top)
        i_ids, i_vec = self.embeddings("item")[:2]
        rows = self._rows(i_ids, item_ids, "item")
        lists = L.lists_for(self, columns, keep, item_table)
        self_rows = torch.arange(len(rows))
        if self.item_item:
            scorer = self._scorer(TOWERS)
        else:
            unit = torch.nn.functional.normalize(i_vec, dim=1)
            scorer = Scorer(unit, unit)
        idx, scores = lists.top(scorer.for_queries(rows), top, self_rows, rows)
        return lists.frame(i_ids[rows.numpy()], idx, scores)

    def recommend_rows(self, df: pd.DataFrame, top: int = 10, history_column: str | None = None,
                       columns: Sequence[str] = (), keep: L.ItemFilter | None = None, item_table=None,
                       separator: str = "|", source: str = "users") -> pd.DataFrame:
        """Lists for users given by feature rows, not in the run (embed_users' rules; history_column for runs
        with model.history_length > 0, whose items in the run are left out). query_id: the id column, or
        "row N" when the rows have none. columns, keep, item_table: as recommend."""
        return L.recommend_rows(self, df, top, history_column, columns, keep, item_table, separator, source)

    def similar_rows(self, df: pd.DataFrame, top: int = 10, columns: Sequence[str] = (),
                     keep: L.ItemFilter | None = None, item_table=None, source: str = "items") -> pd.DataFrame:
        """Lists of the run's items most similar to new items embedded from their feature rows (similar's score);
        query_id as recommend_rows. columns, keep, item_table: as recommend."""
        return L.similar_rows(self, df, top, columns, keep, item_table, source)

    def write_lists(self, out: str | Path, user_ids=None, top: int = 10, columns: Sequence[str] = (),
                    keep: L.ItemFilter | None = None, item_table=None, progress: str = "auto",
                    source: str = "user_ids") -> int:
        """Every user's list (recommend's, known pairs excluded; in item_item runs similar's, only the item itself
        excluded), or those of user_ids (ids not in the run skipped with a warning), streamed block by block to
        a parquet file written atomically and owner-only; returns the rows written. columns, keep, item_table: as
        recommend."""
        return L.write_run_lists(self, out, user_ids, top, columns, keep, item_table, progress, source)

    # ---- evaluation -----------------------------------------------------------------------------
    def _scorer(self, model: str) -> Scorer:
        q_ids, qv, qb, meta = self.embeddings(self._query_side(), model)
        _, cv, cb, _ = self.embeddings("item", model)
        return Scorer(qv, cv, qb, cb, float(meta.get("global_bias", 0.0)), 1.0 / float(meta.get("temperature", 1.0)))

    def evaluate(self, interactions: str | Path | None = None) -> dict:
        """Re-score the run on its held-out pairs, or on a new interaction file with the config's columns."""
        _check_archive(self.folder.file(RunFolder.PAIRS), "pairs file")
        saved = self.folder.read_pairs()
        query_ids, item_ids, split = saved.query_ids, saved.item_ids, saved.split
        if self.config is None:
            raise TowersError(f"{self.dir}: config.yaml is missing; the run folder is incomplete")
        cfg = self.config
        notes = []
        if interactions is not None:
            cfg = cfg.with_section("interactions", path=str(Path(interactions).expanduser().resolve()))
            log = read_interactions(cfg)
            q, c, target, weight = log.query, log.candidate, log.target, log.weight
            qr = positions_in(query_ids, q)
            cr = pd.Index(item_ids).get_indexer(align_id_types(c, item_ids))
            ok = (qr >= 0) & (cr >= 0)
            if (~ok).sum():
                unit = "rows" if cfg.interactions.pairs_from == "rows" and not cfg.interactions.count_repeats else "pairs"
                notes.append(f"{interactions}: skipped {int((~ok).sum()):,} {unit} whose ids are not in this run's catalog")
            if not ok.any():
                raise TowersError(f"{interactions}: no row matches this run's users and items; check the id columns")
            f32 = lambda a: None if a is None else torch.from_numpy(a[ok].astype(np.float32))  # noqa: E731
            new = Pairs(torch.from_numpy(qr[ok].astype(np.int64)), torch.from_numpy(cr[ok].astype(np.int64)),
                        f32(target), f32(weight))
            if log.context is not None and self.context is not None:
                new.context = self.context.encode(log.context.iloc[np.flatnonzero(ok)], interactions)
            warm = split.warm_items[new.candidate]
            cold_user = warm & split.cold_users[new.query]  # users this run held out whole stay a slice of their own
            split.test = new.subset(torch.nonzero(warm & ~cold_user).flatten())
            split.cold_test = new.subset(torch.nonzero(~warm).flatten())
            split.cold_user_test = new.subset(torch.nonzero(cold_user).flatten())
            split.cold_items = ~split.warm_items
        explicit = cfg.training.rating_loss
        scorers = {"popularity": popularity_scorer(split.train, len(query_ids), len(item_ids), explicit, split.item_item)}
        for name in SUBFOLDER_MODELS:
            if self.folder.file(EMBEDDINGS["item"], name).is_file():
                scorers[name] = self._scorer(name)
        scorers[TOWERS] = self._scorer(TOWERS)
        try:
            truth = true_vectors(cfg, query_ids, item_ids, split.item_item)
        except TowersError as exc:
            notes.append(f"oracle skipped: {exc}")
            truth = None
        if truth is not None:
            scorers["oracle"] = oracle_scorer(truth)
        event_vectors = {}
        if self.context is not None:
            block = self._user_block(torch.arange(len(query_ids)))
            towers = {"towers": self.bundle.model.query_tower}
            if "bilinear" in scorers:
                towers["bilinear"] = self.folder.load_bundle("bilinear").model.query_tower
            for name, tower in towers.items():
                event_vectors[name] = (lambda t: lambda p: vectors_with_context(t, block, p.query, p.context))(tower)
        references, reference_info = reference_scorers(split, len(query_ids), len(item_ids), cfg)
        groups = group_labels(cfg, query_ids, item_ids)
        metrics = evaluate_slices(scorers | references, split, cfg, event_vectors, reference_info, groups)
        return {"metrics": metrics, "notes": notes}


