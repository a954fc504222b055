"""Id tables: one row per id, or two small tables whose rows compose every id's row (model.id_table_rows).

The bounded tables are the quotient-remainder trick of Shi, Mudigere, Naumov & Yang, "Compositional
Embeddings Using Complementary Partitions for Memory-Efficient Recommendation Systems" (KDD 2020).
With m remainder classes, id j (counted from 0) gets

    e_j = E_q[j // m]  (op)  E_r[j % m]

where op is the element-wise product (the paper's default) or the sum (model.id_table_combine).
The map j -> (j // m, j % m) is one-to-one (j = m q + r), so no two ids share both rows, and two
tables of about n / m and m rows stand in for n rows.

Row 0 of a full table is the unknown id. Here the unknown id keeps rows of its own: row 0 of both
tables, used by no other id, and id i >= 1 of the encoder is j = i - 1 shifted past them:

    id 0   -> (0, 0)
    id i   -> (1 + (i - 1) // m, 1 + (i - 1) % m)

so the remainder table has m + 1 = model.id_table_rows rows and the quotient table
1 + ceil((n - 1) / m), for n = the full table's rows. The unknown vector starts at zero and learns as
a full table's row 0 does: under the sum both its rows start at zero; under the product its quotient
row starts at ones and its remainder row at zero, so it starts at zero with the gradient of a plain row
(a product of two zero rows would have none and stay zero).

Both tables are sparse nn.Embedding tables: a step's gradient touches only the rows its ids use, and
the sparse optimiser updates only those. The id_l2 penalty (training/loop.py) applies to each id's
composed vector e_j, exactly as it does to a full table's row, so lambda keeps its meaning; the table
rows themselves are not penalised apart from it.
"""

from __future__ import annotations

import math

import torch
import torch.nn as nn

from towers.errors import TowersError

COMBINES = ("product", "sum")


def sparse_table(rows: int, dim: int, std: float) -> nn.Embedding:
    """A table with sparse gradients, rows drawn from N(0, std^2); row 0 (the unknown id) starts at zero."""
    table = nn.Embedding(rows, dim, sparse=True)
    with torch.no_grad():
        table.weight.normal_(0.0, std)
        table.weight[0].zero_()
    return table


def least_rows(ids: int) -> int:
    """The smallest model.id_table_rows whose two tables hold `ids` table rows (the unknown row included)."""
    return 2 + math.isqrt(max(0, ids - 2))  # (cap - 1)^2 >= ids - 1


def id_table(ids: int, dim: int, cap: int, combine: str, std: float, side: str = "id") -> nn.Module:
    """The id table of a tower: one row per id (a sparse nn.Embedding) when cap is 0 or ids <= cap, else a
    QRTable of two tables of at most cap rows. ids counts the rows a full table would have (row 0 included)."""
    if cap == 0 or ids <= cap:
        return sparse_table(ids, dim, std)
    if (cap - 1) ** 2 < ids - 1:
        raise TowersError(f"config key 'model.id_table_rows': got {cap}; expected at least {least_rows(ids):,} for the "
                          f"{ids - 1:,} {side}s (two tables of at most that many rows must cover every id), or 0 "
                          "for one row per id")
    return QRTable(ids, dim, cap - 1, combine, std)


class QRTable(nn.Module):
    """Two sparse tables standing in for one of `num_embeddings` rows; forward(ids) gives each id's vector.

    classes = m, the remainder classes (the remainder table has m + 1 rows, the quotient table
    1 + ceil((num_embeddings - 1) / m)).
    """

    def __init__(self, num_embeddings: int, embedding_dim: int, classes: int, combine: str, std: float):
        super().__init__()
        if combine not in COMBINES:
            raise ValueError(f"combine must be one of {COMBINES}, got {combine!r}")
        self.num_embeddings, self.embedding_dim = num_embeddings, embedding_dim
        self.classes, self.combine = classes, combine
        quotients = 1 + -(-(num_embeddings - 1) // classes)
        # product: each table N(0, std) gives entries of variance std^4; sqrt(std) keeps a full table's std.
        # sum: std / sqrt(2) in each keeps it likewise
        part = math.sqrt(std) if combine == "product" else std / math.sqrt(2.0)
        self.quotient = sparse_table(quotients, embedding_dim, part)
        self.remainder = sparse_table(classes + 1, embedding_dim, part)
        if combine == "product":
            with torch.no_grad():
                self.quotient.weight[0].fill_(1.0)  # the unknown vector 1 * 0 = 0, with a plain row's gradient

    def rows(self, ids: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """The (quotient row, remainder row) of each id; id 0 -> (0, 0)."""
        j = (ids - 1).clamp(min=0)
        known = (ids > 0).to(ids.dtype)
        return (j // self.classes + 1) * known, (j % self.classes + 1) * known

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        q, r = self.rows(ids)
        a, b = self.quotient(q), self.remainder(r)
        return a * b if self.combine == "product" else a + b

    @property
    def stored_rows(self) -> int:
        return self.quotient.num_embeddings + self.remainder.num_embeddings

    def extra_repr(self) -> str:
        return (f"{self.num_embeddings} ids in {self.quotient.num_embeddings} x {self.remainder.num_embeddings} rows, "
                f"{self.embedding_dim}, {self.combine}")


def stored_rows(table: nn.Module | None) -> int:
    """Rows an id table keeps in memory (0 for none)."""
    if table is None:
        return 0
    return table.stored_rows if isinstance(table, QRTable) else table.num_embeddings


def is_bounded(table: nn.Module | None) -> bool:
    """Whether an id table composes each id's row from two shared tables (QRTable)."""
    return isinstance(table, QRTable)


def describe(tables: dict[str, nn.Module | None]) -> str | None:
    """One log line on bounded id tables, {side: table}; None when every table keeps one row per id."""
    if not any(is_bounded(t) for t in tables.values()):
        return None
    parts = []
    for side, t in tables.items():
        if t is None:
            continue
        ids = t.num_embeddings - 1
        if is_bounded(t):
            parts.append(f"{side}: {ids:,} ids in {t.stored_rows:,} rows ({t.quotient.num_embeddings:,} quotient + "
                         f"{t.remainder.num_embeddings:,} remainder, {t.combine}; {t.stored_rows / t.num_embeddings:.1%}"
                         " of one row per id)")
        else:
            parts.append(f"{side}: {ids:,} ids, one row each (within the cap)")
    return ("id tables (model.id_table_rows): " + "; ".join(parts) +
            "; the accuracy cost is measured in README, \"Bounded id tables\"")
