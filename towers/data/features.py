"""One side's features (users or items): encoders fitted on training entities, encoded into tensors.

A `FeatureBlock` is a dict of tensors whose first dimension runs over entities; training batches
gather rows of it with index tensors, so no per-row Python runs in the training loop.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import torch

from towers.data.encoders import IdEncoder, encoder_from_state, make_encoder
from towers.data.tables import (
    align_id_types,
    check_unique_ids,
    normalise_ids,
    padded_form,
    read_table,
    require_columns,
    zero_padded,
)
from towers.errors import TowersError, plain, where

FeatureBlock = dict[str, torch.Tensor]


def take(block: FeatureBlock, rows: torch.Tensor) -> FeatureBlock:
    """Gather the given entity rows of every tensor in a block."""
    return {name: t.index_select(0, rows) for name, t in block.items()}


def block_len(block: FeatureBlock) -> int:
    return len(next(iter(block.values())))


def slice_block(block: FeatureBlock, start: int, stop: int) -> FeatureBlock:
    return {name: t[start:stop] for name, t in block.items()}


def inputs_of(encoders: list) -> list[dict]:
    """What a tower needs to know about each feature: name, kind and size or width."""
    out = []
    for e in encoders:
        if e.kind in ("categorical", "tokens"):
            out.append({"name": e.name, "kind": e.kind, "size": e.size})
        else:
            out.append({"name": e.name, "kind": e.kind, "width": e.width})
    return out


class SideEncoders:
    """The id encoder and feature encoders of one side, with plain-state save and load."""

    def __init__(self, id_encoder: IdEncoder, encoders: list, id_column: str | None):
        self.id_encoder = id_encoder
        self.encoders = encoders
        self.id_column = id_column

    @classmethod
    def fit(cls, table: pd.DataFrame | None, path, id_column: str | None, specs: list[dict],
            train_ids: np.ndarray) -> "SideEncoders":
        """Fit the id vocabulary and every feature encoder on the training entities' rows only."""
        id_enc = IdEncoder.fit(train_ids)
        encoders = [make_encoder(s) for s in specs]
        if encoders:
            ids = normalise_ids(table[id_column], path, id_column)
            train_rows = table.iloc[np.flatnonzero(pd.Index(train_ids).get_indexer(ids) >= 0)] \
                if len(train_ids) else table.iloc[:0]
            if len(train_rows) == 0:
                train_rows = table  # nothing to learn from; fall back to the whole table
            for enc in encoders:
                enc.fit(train_rows[enc.name], path)
        return cls(id_enc, encoders, id_column)

    def encode(self, ids: np.ndarray, table: pd.DataFrame | None, path) -> FeatureBlock:
        """Encode entities (ids plus their feature rows, in the same order) into a block."""
        block: FeatureBlock = {"id": self.id_encoder.transform(ids)}
        for enc in self.encoders:
            block[enc.name] = enc.transform(table[enc.name], path)
        return block

    def unknown_counts(self) -> dict[str, int]:
        """Values mapped to the unknown bucket by the last encode, per feature (for warnings)."""
        return {e.name: e.unknown_seen for e in self.encoders if getattr(e, "unknown_seen", 0)}

    def model_inputs(self) -> list[dict]:
        return inputs_of(self.encoders)

    def state(self) -> dict:
        return {"id_column": self.id_column, "ids": self.id_encoder.state(),
                "features": [e.state() for e in self.encoders]}

    @classmethod
    def from_state(cls, state: dict) -> "SideEncoders":
        return cls(encoder_from_state(state["ids"]), [encoder_from_state(s) for s in state["features"]],
                   state["id_column"])


def _form_hint(bad, table_ids: np.ndarray, path) -> str | None:
    """When the id named in an error is one of the table's zero-padded text ids with its zeros dropped (numbers
    in one file, zero-padded text in the other), the fix for that, else None."""
    found = padded_form(np.asarray([bad], dtype=object), table_ids)
    if found is None:
        return None
    return (f"the ids in {path} are text with leading zeros ({found[1]!r}) and these are numbers, which drop them; "
            "write the ids the same way in both files (as text in both keeps the zeros)")


class SideTable:
    """A side's feature table read and keyed by id (or none when the side has no features)."""

    def __init__(self, path, id_column: str | None, specs: list[dict], missing_rows: str, section: str = "items"):
        self.path, self.id_column, self.specs, self.missing_rows = path, id_column, specs, missing_rows
        self.section = section  # the config section naming the table, for the hints of errors
        self.table: pd.DataFrame | None = None
        self.ids: np.ndarray | None = None
        if path:
            cols = [id_column] + [s.name for s in specs]
            self.table = read_table(path, columns=None, watch=cols, ids=[id_column])
            require_columns(self.table.columns, cols, path)
            self.table = self.table[list(dict.fromkeys(cols))].reset_index(drop=True)
            self.ids = normalise_ids(self.table[id_column], path, id_column)
            check_unique_ids(self.ids, path, id_column)
            # every feature value is checked here, in file order, so an error names the file's row
            # (encoders are later fitted on the training entities' rows only, a subset in another order)
            for spec in specs:
                make_encoder(spec).validate(self.table[spec.name], path)

    @property
    def has_table(self) -> bool:
        return self.table is not None

    def constant_features(self) -> list[str]:
        """The listed features holding one value (or nothing) in every row of the table: they tell no two
        entities apart, so they carry nothing to a new entity's vector."""
        if self.table is None or len(self.table) < 2:
            return []
        out = []
        for spec in self.specs:
            column = self.table[spec.name]
            try:
                distinct = column.nunique(dropna=False)
            except TypeError:  # list or array cells (tokens, vectors) are not hashable: compared as text
                distinct = column.astype(str).nunique(dropna=False)
            if distinct <= 1:
                out.append(spec.name)
        return out

    def catalog(self, interaction_ids: np.ndarray, log_path, log_column: str | tuple[str, ...],
                codes: np.ndarray | None = None, file_rows: bool = True) -> tuple[np.ndarray, pd.DataFrame | None, np.ndarray]:
        """The side's entity universe: table ids plus (per missing_rows) ids only seen in the log.

        `log_column` names the log column the ids came from; a tuple of names means the ids are those
        columns one after another, equally long (item_item mode), so errors name the right column and row.
        With `codes`, interaction_ids are the log's distinct ids and row r of the log holds
        interaction_ids[codes[r]] (data/prepare.IdColumn): every check runs once per distinct id.
        file_rows false: the rows are not one file's (pairs derived from an export, a data-parallel process's
        share, a folder's files one after another), so errors name the id and column but no row. Returns
        (catalog ids, feature rows aligned with them or None, keep-mask over the log's rows).
        """
        columns = (log_column,) if isinstance(log_column, str) else tuple(log_column)
        n_rows = len(interaction_ids) if codes is None else len(codes)
        per_column = max(1, n_rows // len(columns))

        def locate(i: int | None) -> str:
            if i is None:
                return where(log_path, columns[0])
            return where(log_path, columns[min(i // per_column, len(columns) - 1)], i % per_column + 1)

        def per_row(mask: np.ndarray) -> np.ndarray:
            return mask if codes is None else mask[codes]

        def first_row(mask: np.ndarray) -> tuple[int | None, int]:
            """(log row, index into interaction_ids) of the first row where mask holds (row None: not named)."""
            if not file_rows:
                return None, int(np.flatnonzero(mask)[0])
            row = int(np.flatnonzero(per_row(mask))[0])
            return row, row if codes is None else int(codes[row])

        if self.table is None:
            uniq = pd.unique(interaction_ids)
            uniq = np.sort(uniq) if uniq.dtype.kind in "iu" else np.asarray(sorted(uniq), dtype=object)
            return uniq, None, np.ones(n_rows, bool)
        if self.ids.dtype.kind in "iu" and interaction_ids.dtype == object and self.missing_rows != "drop":
            # text ids in the log against whole-number ids in the table: any id that is not a whole number
            # can match no row, and (missing_rows: default) could not become a catalog entity of that type
            parsed = pd.to_numeric(pd.Series(interaction_ids, dtype=object), errors="coerce").to_numpy(dtype=np.float64)
            with np.errstate(invalid="ignore"):
                text = ~(np.isfinite(parsed) & (parsed == np.round(parsed)))
            if text.any():
                row, at = first_row(text)
                raise TowersError(
                    f"{locate(row)}: mixed id types: {interaction_ids[at]!r} is text but the ids in {self.path} are "
                    "whole numbers; store every id as a number (or every id as text in both files)")
        if self.ids.dtype.kind in "iu" and interaction_ids.dtype == object:
            padded = zero_padded(interaction_ids)
            if padded.any():  # '07' and '0007' would both become 7: two ids taken for one
                row, at = first_row(padded)
                shown = str(interaction_ids[at]).strip()
                raise TowersError(
                    f"{locate(row)}: id {shown!r} is text written with a leading zero or sign, but the ids in "
                    f"{self.path} are whole numbers, so it would be read as {int(shown)} (as would every other way "
                    "of writing that number); write the ids the same way in both files: as text in both (a parquet "
                    "string column, or a CSV, which keeps the zeros) or as plain numbers in both")
        ids = align_id_types(interaction_ids, self.ids)
        known = pd.Index(self.ids).get_indexer(ids) >= 0
        keep = np.ones(n_rows, bool)
        table, cat_ids = self.table, self.ids
        if not known.all():
            missing = pd.unique(ids[~known])
            if self.missing_rows == "error":
                row, at = first_row(~known)
                bad = plain(interaction_ids[at])
                raise TowersError(
                    f"{locate(row)}: id {bad!r} has no row in {self.path} ({len(missing)} such ids); "
                    + (_form_hint(bad, self.ids, self.path) or
                       f"add feature rows, or set {self.section}.missing_rows: drop or default"))
            if self.missing_rows == "drop":
                keep = per_row(known)
            else:
                filler = pd.DataFrame({c: pd.Series([None] * len(missing), dtype=object) for c in table.columns})
                filler[self.id_column] = missing
                table = pd.concat([table, filler], ignore_index=True)
                cat_ids = np.concatenate([cat_ids, missing.astype(cat_ids.dtype)])
        return cat_ids, table, keep
