"""`towers embed --history-column` and `towers recommend --history` on a run whose user tower reads histories."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import torch

import towers.runs.run as run_module
from towers.cli import main as cli
from towers.data.history import history_column
from towers.runs.folder import RunFolder

from ..helpers import read_vectors

pytestmark = pytest.mark.slow  # every test reads a tiny trained run


@pytest.fixture(scope="module")
def history_run(tiny_runs):
    return tiny_runs.train(model={"history_length": 4}, training={"loss": "softmax", "negatives": 32})


@pytest.fixture(scope="module")
def users_with_history(history_run, small_store):
    """(feature rows of run users, their training histories oldest first, their rows in the exported users)."""
    saved = RunFolder(history_run).read_pairs()
    bags = history_column(saved.split.train, len(saved.query_ids), len(saved.item_ids), 4)
    rows = torch.nonzero((bags > 0).any(1)).flatten()[:40].numpy()
    lists = [[str(saved.item_ids[j - 1]) for j in bags[r].tolist() if j > 0][::-1] for r in rows]
    ids = read_vectors(history_run / "user_embeddings.parquet")[0]
    users = pd.read_csv(small_store / "customers.csv").set_index("customer_id").loc[[ids[r] for r in rows]]
    return users.reset_index(), lists, rows


def _call(capsys, *argv):
    try:
        code = cli([str(a) for a in argv])
    except SystemExit as exc:  # argparse's usage errors: one line, exit 2
        code = exc.code
    out, err = capsys.readouterr()
    return code, out, err


def test_embed_reads_a_text_history_column(history_run, users_with_history, tmp_path, capsys):
    users, lists, rows = users_with_history
    path = tmp_path / "users.csv"
    users.assign(recent=[";".join(h) for h in lists]).to_csv(path, index=False)
    out = tmp_path / "users.parquet"
    code, stdout, err = _call(capsys, "embed", history_run, "--users", path, "--history-column", "recent",
                              "--history-separator", ";", "--out", out)
    assert code == 0 and f"embedded {len(users)} users" in stdout and "warning" not in err
    want = read_vectors(history_run / "user_embeddings.parquet")[1][rows]  # reference: pyarrow alone
    np.testing.assert_allclose(read_vectors(out)[1], want, atol=1e-5)
    # the separator left at its default '|': the warning shows an id and says what seems to join them
    code, _, err = _call(capsys, "embed", history_run, "--users", path, "--history-column", "recent", "--out", out)
    multi = next(h for h in lists if len(h) > 1)  # the first history read as one id
    assert code == 0 and f"(e.g. {';'.join(multi)!r}: ids joined by ';'? set the history separator to it)" in err, err


def test_embed_streams_a_parquet_list_column_and_counts_unknown_ids(history_run, users_with_history, tmp_path,
                                                                   capsys, monkeypatch):
    users, lists, rows = users_with_history
    monkeypatch.setattr(run_module, "EMBED_CHUNK", 7)  # several pieces, so counts are summed over them
    noisy = [h + ["NO-SUCH-ITEM"] if i % 3 == 0 else h for i, h in enumerate(lists)]
    path = tmp_path / "users.parquet"
    table = pa.Table.from_pandas(users, preserve_index=False).append_column("recent", pa.array(noisy, pa.list_(pa.string())))
    pq.write_table(table, path)
    out = tmp_path / "embedded.parquet"
    code, _, err = _call(capsys, "embed", history_run, "--users", path, "--history-column", "recent", "--out", out)
    assert code == 0
    unknown = sum(i % 3 == 0 for i in range(len(lists)))
    assert err.strip() == (f"warning: {path}, column 'recent': left out of the histories {unknown} item ids not in "
                           "this run's items (e.g. 'NO-SUCH-ITEM')")
    want = read_vectors(history_run / "user_embeddings.parquet")[1][rows]  # reference: pyarrow alone
    np.testing.assert_allclose(read_vectors(out)[1], want, atol=1e-5)


def test_recommend_for_a_history(history_run, users_with_history, capsys):
    _, lists, _ = users_with_history
    given = lists[0][:2]
    code, stdout, _ = _call(capsys, "recommend", history_run, "--history", *given, "--top", "5")
    lines = stdout.strip().splitlines()
    assert code == 0 and len(lines) == 6 and all(line.split()[0] == "(history)" for line in lines[1:])
    assert not {line.split()[2] for line in lines[1:]} & set(given)  # the given items are excluded


def test_history_flags_refused_where_they_cannot_apply(history_run, tiny_runs, small_store, tmp_path, capsys):
    plain = tiny_runs.train()  # model.history_length 0
    capsys.readouterr()  # its training log, when this test trained it
    path = tmp_path / "users.csv"
    pd.read_csv(small_store / "customers.csv").head(3).assign(recent="TR-00001").to_csv(path, index=False)
    out = tmp_path / "out.parquet"
    cases = [
        (["embed", plain, "--users", path, "--history-column", "recent", "--out", out],
         r"trained without user histories \(model.history_length is 0\).*retrain with model.history_length > 0"),
        (["recommend", plain, "--history", "TR-00001"], r"trained without user histories"),
        (["embed", history_run, "--items", small_store / "new_items.parquet", "--history-column", "recent",
          "--out", out], r"--history-column gives users' histories; use it with --users"),
        (["embed", history_run, "--users", path, "--history-column", "nope", "--out", out], r"column 'nope'"),
        (["recommend", history_run, "--users", "1", "--history", "TR-00001"], r"not allowed with argument"),
    ]
    for argv, message in cases:
        code, _, err = _call(capsys, *argv)
        lines = err.strip().splitlines()
        assert code == 2 and len(lines) == 1 and lines[0].startswith("error: "), (argv, err)
        assert re.search(message, lines[0]), (message, lines[0])
