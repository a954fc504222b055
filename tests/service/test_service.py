"""`towers serve` end to end: a real server process on 127.0.0.1, asked over HTTP with http.client.

Answers must equal the Run API's (and so the CLI's) for the same requests; every bad request gets a
4xx with a one-line JSON error and the next request is answered; no answer ever holds a traceback.
"""

from __future__ import annotations

import contextlib
import http.client
import json
import logging
import os
import re
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

import towers
import towers.service
from towers.cli import main as cli
from towers.runs.lists import ItemFilter

from ..conftest import ROOT
from ..helpers import read_vectors, score_scale

pytestmark = pytest.mark.slow  # every test reads a tiny trained run or starts a server

UNKNOWN_ITEM = "TR-99999"  # not in the small store (TR-00000 to TR-00219)


@pytest.fixture(scope="module")
def history_run(tiny_runs):
    return tiny_runs.train(model={"history_length": 4}, training={"loss": "softmax", "negatives": 32})


@pytest.fixture(scope="module")
def run(history_run):
    return towers.load(history_run)


class Server:
    """A `towers serve` process: its address, its log, and one request at a time over http.client."""

    def __init__(self, host: str, port: int, log_path, process):
        self.host, self.port, self.log_path, self.process = host, port, log_path, process

    def connect(self) -> http.client.HTTPConnection:
        return http.client.HTTPConnection(self.host, self.port, timeout=60)

    def call(self, method: str, path: str, body=None, raw: bytes | None = None, headers: dict | None = None,
             conn: http.client.HTTPConnection | None = None):
        """(status, parsed JSON) of one request; checks that the answer is JSON and holds no traceback."""
        own = conn is None
        conn = conn or self.connect()
        data = raw if raw is not None else (None if body is None else json.dumps(body).encode())
        conn.request(method, path, body=data, headers={"Content-Type": "application/json"} | (headers or {}))
        response = conn.getresponse()
        text = response.read().decode()
        if own:
            conn.close()
        assert "Traceback" not in text and 'File "' not in text  # no traceback ever reaches a client
        return response.status, json.loads(text)


@pytest.fixture(scope="module")
def server(history_run, tmp_path_factory):
    log_path = tmp_path_factory.mktemp("serve") / "server.log"
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    with open(log_path, "wb") as log:  # stdout (the address, uvicorn's access lines) and stderr, as an operator sees
        process = subprocess.Popen([sys.executable, "-m", "towers", "serve", str(history_run), "--port", "0",
                                    "--threads", "2"], stdout=log, stderr=subprocess.STDOUT, env=env)
    found = None
    for _ in range(1200):  # the address line, once the server listens (a minute at most)
        found = re.search(r"http://([\d.]+):(\d+) with 2 worker threads", log_path.read_text())
        if found or process.poll() is not None:
            break
        time.sleep(0.05)
    if not found:
        process.kill()
        pytest.fail(f"no address line from towers serve; its output: {log_path.read_text()}")
    yield Server(found.group(1), int(found.group(2)), log_path, process)
    process.send_signal(signal.SIGINT)  # Ctrl-C: uvicorn's graceful shutdown, then exit code 0
    assert process.wait(timeout=30) == 0
    assert "stopped" in log_path.read_text().splitlines()[-3:]  # said once the shutdown is done, SIGTERM's too


def _rows(lists: list[dict]) -> list[tuple]:
    """The answer's lists as (query_id, rank, item_id, score) rows, the Run API's table layout."""
    return [(each["query_id"], item["rank"], item["item_id"], item["score"]) for each in lists for item in each["items"]]


def _table(frame: pd.DataFrame) -> list[tuple]:
    return [(q.item() if hasattr(q, "item") else q, int(r), i.item() if hasattr(i, "item") else i, float(s))
            for q, r, i, s in frame[["query_id", "rank", "item_id", "score"]].itertuples(index=False)]


@pytest.fixture(scope="module")
def ids(history_run):
    users = read_vectors(history_run / "user_embeddings.parquet")[0]
    items = read_vectors(history_run / "item_embeddings.parquet")[0]
    return users, items


# ---------------------------------------------------------------- answers equal the library's

def test_health_and_model(server, history_run):
    assert server.call("GET", "/health") == (200, {"status": "ok", "run": history_run.name})
    status, about = server.call("GET", "/model")
    assert status == 200
    meta = pq.read_schema(history_run / "item_embeddings.parquet").metadata
    assert about["model"]["k"] == int(meta[b"k"])  # reference: the embeddings file's own metadata, read with pyarrow
    assert about["model"]["score"] == meta[b"score"].decode()
    saved = json.loads((history_run / "metrics.json").read_text())
    assert about["metrics"]["warm"]["towers"] == pytest.approx(saved["warm"]["towers"])  # reference: metrics.json
    users, items = read_vectors(history_run / "user_embeddings.parquet")[0], read_vectors(
        history_run / "item_embeddings.parquet")[0]
    assert about["catalog"] == {"users": len(users), "items": len(items)}
    assert about["data"]["training_pairs"] > 0 and about["model"]["history_length"] == 4
    assert about["columns"]["items"][0] == "item_id" and "price" in about["columns"]["items"]


def test_recommend_for_users_equals_the_run_api(server, run, ids, history_run):
    users = [int(u) for u in ids[0][:3]]
    status, answer = server.call("POST", "/recommend", {"users": users, "top": 7})
    assert status == 200 and answer["notes"] == []
    assert _rows(answer["lists"]) == _table(run.recommend(users, 7))  # reference: the Run API the CLI calls
    # reference: brute-force scores from the exported vectors (pyarrow alone), README's formula:
    # q . x / temperature + user bias + item bias + global bias
    u_ids, u_vec, u_bias = read_vectors(history_run / "user_embeddings.parquet")
    i_ids, i_vec, i_bias = read_vectors(history_run / "item_embeddings.parquet")
    scale, g = score_scale(history_run / "item_embeddings.parquet")
    first = answer["lists"][0]
    q = u_ids.index(first["query_id"])
    for item in first["items"]:
        j = i_ids.index(item["item_id"])
        assert item["score"] == pytest.approx(u_vec[q] @ i_vec[j] * scale + u_bias[q] + i_bias[j] + g, abs=1e-5)
    scores = [item["score"] for item in first["items"]]
    assert scores == sorted(scores, reverse=True)


def test_ids_as_text_find_numeric_users(server, run, ids):
    user = int(ids[0][5])
    _, as_number = server.call("POST", "/recommend", {"users": [user], "top": 3})
    _, as_text = server.call("POST", "/recommend", {"users": [str(user)], "top": 3})
    assert as_text == as_number  # reference: the CLI passes every id as text (README, recommend)


def test_recommend_for_a_history_equals_the_run_api_with_a_note(server, run, ids):
    items = [ids[1][3], ids[1][8], UNKNOWN_ITEM]
    status, answer = server.call("POST", "/recommend", {"history": items, "top": 5})
    assert status == 200
    assert _rows(answer["lists"]) == _table(run.recommend_history(items, 5))  # reference: the Run API
    assert len(answer["notes"]) == 1 and "1 item id not in this run's items" in answer["notes"][0]


def test_similar_equals_the_cli(server, history_run, ids, tmp_path):
    items = [ids[1][0], ids[1][10]]
    status, answer = server.call("POST", "/similar", {"items": items, "top": 4})
    assert status == 200
    out = tmp_path / "similar.csv"
    assert cli(["similar", str(history_run), "--items", *items, "--top", "4", "--out", str(out)]) == 0
    want = pd.read_csv(out)  # reference: `towers similar --out` for the same request
    got = _rows(answer["lists"])
    assert [r[:3] for r in got] == list(want[["query_id", "rank", "item_id"]].itertuples(index=False, name=None))
    np.testing.assert_allclose([r[3] for r in got], want["score"], rtol=1e-6)


def test_embed_items_reproduces_the_exported_vectors(server, history_run, small_store):
    table = pd.read_parquet(small_store / "items.parquet").head(3)
    rows = [{k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in row.items()}
            for row in table.to_dict("records")]
    status, answer = server.call("POST", "/embed", {"side": "items", "rows": rows})
    assert status == 200 and [e["id"] for e in answer["embeddings"]] == table["item_id"].tolist()
    i_ids, i_vec, i_bias = read_vectors(history_run / "item_embeddings.parquet")
    at = [i_ids.index(i) for i in table["item_id"]]
    # reference: item_embeddings.parquet read with pyarrow (re-embedding catalog rows reproduces it; README, embed)
    np.testing.assert_allclose([e["embedding"] for e in answer["embeddings"]], i_vec[at], atol=1e-5)
    np.testing.assert_allclose([e["bias"] for e in answer["embeddings"]], i_bias[at], atol=1e-6)


def test_embed_users_with_histories_equals_the_run_api(server, run, small_store, ids):
    users = pd.read_csv(small_store / "customers.csv").head(2).assign(customer_id=lambda d: d.customer_id + 10**7)
    history = [[ids[1][1], ids[1][2]], [UNKNOWN_ITEM]]
    body = {"side": "users", "rows": users.to_dict("records"), "history": history}
    status, answer = server.call("POST", "/embed", body)
    assert status == 200 and any("not in this run's items" in n for n in answer["notes"])
    want = run.embed_users(users, history=history)  # reference: the Run API
    np.testing.assert_allclose([e["embedding"] for e in answer["embeddings"]], np.stack(want["embedding"]), atol=1e-6)
    assert [e["id"] for e in answer["embeddings"]] == want["id"].tolist()


def test_item_columns_and_filters_equal_the_run_api(server, run, ids, small_store):
    users = [int(u) for u in ids[0][:2]]
    keep = {"only_values": {"department": ["Garden", "Hand Tools"]}, "never_ids": [ids[1][0]]}
    body = {"users": users, "top": 5, "columns": ["name", "price", "tags"], "keep": keep}
    status, answer = server.call("POST", "/recommend", body)
    assert status == 200
    want = run.recommend(users, 5, columns=["name", "price", "tags"], keep=ItemFilter.from_dict(keep))
    assert _rows(answer["lists"]) == _table(want)  # reference: the Run API
    table = pd.read_parquet(small_store / "items.parquet").set_index("item_id")  # reference: the item table (pandas)
    for item in (i for each in answer["lists"] for i in each["items"]):
        row = table.loc[item["item_id"]]
        assert row["department"] in ("Garden", "Hand Tools") and item["item_id"] != ids[1][0]
        assert (item["name"], item["price"], item["tags"]) == (row["name"], row["price"], list(row["tags"]))


def test_a_new_users_row_and_history_equal_recommend_rows(server, run, small_store, ids):
    user = pd.read_csv(small_store / "customers.csv").head(1).assign(customer_id=lambda d: d.customer_id + 10**7)
    history = [ids[1][4], ids[1][6]]
    body = {"user_row": user.iloc[0].to_dict(), "history": history, "top": 6, "columns": ["department"]}
    status, answer = server.call("POST", "/recommend", json.loads(json.dumps(body, default=lambda v: v.item())))
    assert status == 200
    frame = user.assign(recent=[history])
    want = run.recommend_rows(frame, 6, history_column="recent", columns=["department"])  # reference: the Run API
    assert _rows(answer["lists"]) == _table(want)
    assert not {i["item_id"] for i in answer["lists"][0]["items"]} & set(history)  # the history's items left out


def test_a_new_items_row_equals_similar_rows(server, run, small_store):
    table = pd.read_parquet(small_store / "new_items.parquet").head(1)
    row = {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in table.iloc[0].to_dict().items()}
    status, answer = server.call("POST", "/similar", {"item_row": row, "top": 4, "keep": {"never_values": {
        "department": "Garden"}}})
    assert status == 200
    want = run.similar_rows(table, 4, keep=ItemFilter.from_dict({"never_values": {"department": "Garden"}}))
    assert _rows(answer["lists"]) == _table(want)  # reference: the Run API


def test_concurrent_clients_get_their_own_answers_and_notes(server, run, ids):
    """8 clients on keep-alive connections at once: each answer equals the Run API's for its request, and a
    note (a history id left out) reaches only the request that caused it."""
    requests = []
    for i in range(8):
        if i % 2:
            requests.append(("/similar", {"items": [ids[1][i]], "top": 5}, _table(run.similar([ids[1][i]], 5)), False))
        else:
            history = [ids[1][i], UNKNOWN_ITEM]
            requests.append(("/recommend", {"history": history, "top": 5}, _table(run.recommend_history(history, 5)),
                             True))
    failures = []

    def client(path, body, want, noted):
        conn = server.connect()
        try:
            for _ in range(4):
                status, answer = server.call("POST", path, body, conn=conn)
                if status != 200 or _rows(answer["lists"]) != want or bool(answer["notes"]) != noted:
                    failures.append((path, status, answer))
        finally:
            conn.close()

    threads = [threading.Thread(target=client, args=r) for r in requests]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert failures == []  # reference: the Run API answering the same requests one by one


# ---------------------------------------------------------------- bad requests

ITEM = "TR-00001"
BIG = b'{"items": [' + b'"TR-00001", ' * 100_000 + b'"TR-00001"]}'  # 1.2 MB

# (case, method, path, body (bytes are sent as they are), headers, status, words of the message);
# status codes: RFC 9110, section 15.5 (400, 404, 405, 413, 415, 422)
BAD = [
    ("malformed JSON", "POST", "/similar", b'{"items": ["TR-00001"', None, 400, "not valid JSON"),
    ("no body", "POST", "/similar", b"", None, 400, "body is missing"),
    ("not UTF-8", "POST", "/similar", b'{"items": ["\xff\xfe"]}', None, 400, "could not be read as JSON"),
    ("nested too deeply", "POST", "/similar", b'{"items": ' + b"[" * 100_000 + b"]" * 100_000 + b"}", None, 400,
     "could not be read as JSON"),
    ("not an object", "POST", "/similar", [ITEM], None, 422, "JSON object"),
    ("top as text", "POST", "/similar", {"items": [ITEM], "top": "5"}, None, 422, "top: "),
    ("top of zero", "POST", "/similar", {"items": [ITEM], "top": 0}, None, 422, "top: "),
    ("top too large", "POST", "/similar", {"items": [ITEM], "top": 501}, None, 422, "less than or equal to 500"),
    ("id as a fraction", "POST", "/similar", {"items": [1.5]}, None, 422, "items.0: an id is a whole number or text"),
    ("id as true", "POST", "/similar", {"items": [True]}, None, 422, "items.0"),
    ("no ids", "POST", "/similar", {"items": []}, None, 422, "items: "),
    ("too many ids", "POST", "/similar", {"items": [ITEM] * 101}, None, 422, "at most 100"),
    ("unknown field", "POST", "/similar", {"items": [ITEM], "colour": "red"}, None, 422, "colour"),
    ("misspelt field", "POST", "/recommend", {"user": [1]}, None, 422, "user: not a field of this request; did you mean "
     "'users'?"),
    ("another endpoint's field", "POST", "/similar", {"users": [1]}, None, 422, "users: not a field of this request; "
     "/recommend takes it"),
    ("unknown item", "POST", "/similar", {"items": [UNKNOWN_ITEM]}, None, 422, f"unknown item id '{UNKNOWN_ITEM}'"),
    ("unknown user", "POST", "/recommend", {"users": [1]}, None, 422, "unknown user id 1"),
    # a request's fields, not the command line's options: a trial's 422 said "--history", "--user-rows"
    ("unknown user's way in", "POST", "/recommend", {"users": [1]}, None, 422,
     "a few item ids ('history') or feature rows ('user_row')"),
    ("text id for numeric users", "POST", "/recommend", {"users": ["nobody"]}, None, 422, "not a number"),
    ("zero-padded id for numeric users", "POST", "/recommend", {"users": ["0100307"]}, None, 422,
     "user id '0100307' is written with a leading zero or sign, but this run's user ids are whole numbers as they "
     "print; give it as 100307"),
    ("users and history", "POST", "/recommend", {"users": [1], "history": [ITEM]}, None, 422, "give one of 'users'"),
    ("context without context columns", "POST", "/recommend", {"history": [ITEM], "context": {"channel": "app"}},
     None, 422, "without context columns"),
    ("embed without a column", "POST", "/embed", {"side": "items", "rows": [{"item_id": "TR-NEW"}]}, None, 422,
     "no such column"),
    ("embed a bad value", "POST", "/embed", {"side": "users", "rows": [
        {"customer_id": 1, "age_band": "60+", "neighbourhood": "Marsh End", "household_size": "two",
         "has_garden": "yes", "member_since": 2020}]}, None, 422, "column 'household_size', row 1"),
    ("embed an infinite number", "POST", "/embed", {"side": "items", "rows": [{"item_id": "X", "price": 1e999}]},
     None, 422, "finite number"),
    ("history for items", "POST", "/embed", {"side": "items", "rows": [{"item_id": "X"}], "history": [[ITEM]]}, None,
     422, "history"),
    ("unknown filter key", "POST", "/similar", {"items": [ITEM], "keep": {"sometimes": ["x"]}}, None, 422,
     "keep.sometimes"),
    ("unknown item column", "POST", "/similar", {"items": [ITEM], "columns": ["colour"]}, None, 422,
     "the item table, column 'colour': no such column"),
    ("a list column's name", "POST", "/similar", {"items": [ITEM], "columns": ["score"]}, None, 422,
     "already have a column of that name"),
    ("only_true on text", "POST", "/similar", {"items": [ITEM], "keep": {"only_true": ["department"]}}, None, 422,
     "not true or false"),
    ("ids and a row", "POST", "/similar", {"items": [ITEM], "item_row": {"item_id": "X"}}, None, 422, "either 'items'"),
    ("context with a user row", "POST", "/recommend", {"user_row": {"customer_id": 1}, "context": {"a": 1}}, None, 422,
     "not with 'user_row'"),
    ("sent as a form", "POST", "/similar", b"items=TR-00001", {"Content-Type": "application/x-www-form-urlencoded"},
     415, "Content-Type: application/json"),
    ("body too large", "POST", "/similar", BIG, None, 413, "larger than 1,048,576 bytes"),
    ("no such endpoint", "GET", "/lists", None, None, 404, "no endpoint /lists"),
    ("a trailing slash", "POST", "/recommend/", {"users": [1]}, None, 404, "no endpoint /recommend/"),
    ("wrong method", "GET", "/recommend", None, None, 405, "GET is not allowed on /recommend"),
]


@pytest.mark.parametrize("case, method, path, body, headers, status, words", BAD, ids=[b[0] for b in BAD])
def test_a_bad_request_gets_one_line_and_the_server_keeps_serving(server, case, method, path, body, headers, status,
                                                                   words, tmp_path_factory):
    raw = body if isinstance(body, bytes) else None
    got, answer = server.call(method, path, None if raw is not None else body, raw=raw, headers=headers)
    assert got == status and list(answer) == ["error"]
    assert words in answer["error"] and "\n" not in answer["error"]  # one line: the CLI's error contract
    assert str(tmp_path_factory.getbasetemp()) not in answer["error"]  # the server's paths (run, tables) stay on it
    assert server.call("POST", "/similar", {"items": [ITEM], "top": 2})[0] == 200  # and it keeps serving


def test_request_bodies_stay_out_of_the_server_log(server):
    secret = "TR-PRIVATE-4471"
    assert server.call("POST", "/recommend", {"history": [secret, ITEM], "top": 2})[0] == 200
    assert server.call("POST", "/recommend", {"users": [secret]})[0] == 422
    time.sleep(0.2)  # the access log line is written after the answer
    log = server.log_path.read_text()
    assert "POST /recommend" in log and secret not in log  # README, Personal data: ids are personal data


# ---------------------------------------------------------------- failures of the server itself

@contextlib.contextmanager
def served_here(run):
    """`run` served by make_app on a uvicorn thread of this process (warnings are not notes here: pytest keeps
    them); yields the module's Server client for it."""
    import uvicorn

    from towers.service import app as service_app

    application = service_app.make_app(run, 1)
    sock = towers.service.listen("127.0.0.1", 0)
    server = uvicorn.Server(uvicorn.Config(application, log_config=None, access_log=False))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]})
    thread.start()
    try:
        while not server.started:
            time.sleep(0.01)
        yield Server("127.0.0.1", sock.getsockname()[1], None, None)
    finally:
        server.should_exit = True
        thread.join(timeout=30)
        sock.close()


def test_a_bug_gets_a_generic_500_and_a_log_line(history_run, caplog):
    """An exception that is not a TowersError: 500 with a generic line, the traceback only in the server log."""
    from towers.service.app import INTERNAL

    run = towers.load(history_run)

    def broken(*args, **kwargs):
        raise RuntimeError("private detail of the failure")

    with served_here(run) as client:
        run.similar = broken  # after the warm-up, which calls it
        with caplog.at_level(logging.ERROR, logger="uvicorn.error"):
            status, answer = client.call("POST", "/similar", {"items": [ITEM]})
        assert status == 500 and answer == {"error": INTERNAL}  # RFC 9110, 15.6.1
        logged = [r for r in caplog.records if r.exc_info]
        assert logged and "POST /similar" in logged[0].getMessage() and logged[0].exc_info[0] is RuntimeError
        assert client.call("GET", "/health")[0] == 200


def test_an_item_item_run_is_served_as_the_run_api_answers(tiny_runs):
    run = towers.load(tiny_runs.train(config="store_copurchase.yaml", model={"shared_tower": False, "temperature": 0.5},
                                      evaluation={"baseline": False}))
    items = [str(i) for i in run.embeddings("item")[0][:2]]
    with served_here(run) as client:
        status, about = client.call("GET", "/model")
        assert status == 200 and about["mode"] == "item_item" and about["columns"]["users"] is None
        assert about["model"]["temperature"] == 0.5  # reference: the config this run was trained with
        status, answer = client.call("POST", "/recommend", {"users": items, "top": 5})
        assert status == 200 and _rows(answer["lists"]) == _table(run.recommend(items, 5))  # reference: the Run API
        status, answer = client.call("POST", "/similar", {"items": items, "top": 5})
        assert status == 200 and _rows(answer["lists"]) == _table(run.similar(items, 5))  # reference: the Run API
        status, answer = client.call("POST", "/recommend", {"history": items})
        assert status == 422 and "item_item" in answer["error"]  # the CLI's message for --history
        status, answer = client.call("POST", "/embed", {"side": "users", "rows": [{"item_id": items[0]}]})
        assert status == 422 and "item_item" in answer["error"]


def test_a_note_names_the_item_table_in_words_not_by_its_path(server, tmp_path_factory):
    # a filter value no item holds is a note naming the table; the server's own paths stay on it, as in errors
    status, answer = server.call("POST", "/similar", {"items": [ITEM], "top": 2,
                                                      "keep": {"only_values": {"department": ["no such department"]}}})
    assert status == 200 and answer["notes"]
    assert any("the item table" in note for note in answer["notes"])
    assert not any(str(tmp_path_factory.getbasetemp()) in note for note in answer["notes"])
