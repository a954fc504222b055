"""`towers serve`'s own failures before it serves: each a one-line error and exit code 2 (no run is read)."""

from __future__ import annotations

import socket
import sys

import pytest

import towers.service
from towers.cli import main as cli


@pytest.mark.parametrize("argv, words", [
    (["--threads", "0"], "--threads must be a positive whole number"),
    (["--port", "70000"], "give a --port from 0 to 65535"),
])
def test_bad_serve_options_are_one_line(argv, words, capsys):
    assert cli(["serve", "no-such-run", *argv]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and words in err and err.count("\n") == 1  # the CLI's error contract


def test_a_port_in_use_is_one_line(capsys):
    taken = socket.socket()
    taken.bind(("127.0.0.1", 0))
    taken.listen(1)
    try:
        port = taken.getsockname()[1]
        assert cli(["serve", "no-such-run", "--port", str(port)]) == 2
    finally:
        taken.close()
    err = capsys.readouterr().err
    assert f"cannot listen on 127.0.0.1:{port}" in err and err.count("\n") == 1  # reference: EADDRINUSE, bind(2)


@pytest.mark.parametrize("missing", ["fastapi", "uvicorn"])
def test_serve_without_the_extra_says_how_to_install_it(monkeypatch, capsys, missing):
    monkeypatch.setitem(sys.modules, missing, None)  # an import of it now fails as if it were not installed
    monkeypatch.delitem(sys.modules, "towers.service.app", raising=False)
    monkeypatch.delattr(towers.service, "app", raising=False)
    assert cli(["serve", "no-such-run"]) == 2
    err = capsys.readouterr().err
    assert err == f"error: {towers.service.INSTALL}\n" and "pip install 'towers[serve]'" in err


def test_the_listening_socket_says_tcp():
    """Regression: the socket was made with proto 0, and asyncio sets TCP_NODELAY only on sockets whose proto is
    IPPROTO_TCP, so every answer on a kept-alive connection waited about 40 ms for a delayed ACK."""
    sock = towers.service.listen("127.0.0.1", 0)
    try:
        assert sock.proto == socket.IPPROTO_TCP  # reference: asyncio base_events._set_nodelay's condition
    finally:
        sock.close()


class _Served(Exception):
    """Raised in place of building the app: the test has what serve would serve."""


@pytest.mark.slow  # trains the tiny run on first use
def test_serve_new_items_serves_the_run_with_them(tiny_runs, small_store, monkeypatch, capsys):
    from towers.service import app as service_app

    served = {}

    def capture(run, threads, item_table=None):
        served["run"] = run
        raise _Served
    monkeypatch.setattr(service_app, "make_app", capture)
    new_items = small_store / "new_items.parquet"
    with pytest.raises(_Served):
        towers.service.serve(tiny_runs.train(), port=0, new_items=new_items)
    # reference: the Run API's own view with the new items (tests/runs/test_lists.py checks its scores)
    want = towers.load(tiny_runs.train()).with_new_items(new_items)
    assert (served["run"].embeddings("item")[0] == want.embeddings("item")[0]).all()
