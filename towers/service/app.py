"""The HTTP endpoints of `towers serve` (FastAPI): request models, limits, errors, and the worker threads.

Every request is checked by a pydantic model (types, and the limits below) before the run sees it;
a body over MAX_BODY_BYTES is refused before it is parsed. The run's own methods then do the work on one of
`threads` worker threads, so the event loop never waits on torch: torch releases the GIL in its
products and the numba kernels run without it, so requests proceed in parallel. Inference is safe
across threads: the run's files are read once at start (warm_up), after which a request only reads
them; grad mode is per thread, and the run's methods switch it off themselves; each worker thread
runs torch, and so the top-N search, on one thread. Requests that encode feature rows run one at a
time: the encoders count unseen values for their warnings in state shared by every thread. The item
table that columns and filters read is cached as one (key, table) value, replaced whole when the file
changes, so those requests need no lock.

Answers: JSON with the result and `notes` (the library's warnings for this request); errors:
{"error": one line} with 400 (not JSON), 404 / 405 (no such endpoint), 413 (too large), 415 (not
sent as JSON), 422 (a field, or the run, refused the request: the TowersError's message) or 500 (a
bug: a generic line here, the traceback in the server log). Request bodies are never logged.
"""

from __future__ import annotations

import difflib
import json
import logging
import re
import threading
import warnings
from pathlib import Path
from typing import Annotated, Any, Literal

import anyio
import numpy as np
import pandas as pd
import torch
from fastapi import FastAPI
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response
from pydantic import BaseModel, ConfigDict, Field, PlainValidator, model_validator
from starlette.exceptions import HTTPException

from towers import api
from towers.data.history import HISTORY
from towers.errors import TowersError
from towers.runs.lists import LIST_COLUMNS, ItemFilter

MAX_BODY_BYTES = 1 << 20  # 1 MiB
DRAIN_BYTES = 16 << 20  # a larger body is read and dropped up to this size before the 413 answer
MAX_IDS = 100  # user or item ids per request
MAX_HISTORY = 1000  # item ids in one history
MAX_TOP = 500  # items per list
MAX_ROWS = 1000  # feature rows per request
MAX_COLUMNS = 200  # columns of a feature row, or of a context
MAX_TEXT = 10_000  # characters of one text value
MAX_LIST = 4096  # values in one list value (tokens, a vector)
MAX_ID_TEXT = 200  # characters of one text id
INT64 = (-(1 << 63), (1 << 63) - 1)

INTERNAL = "internal error; the server log has the details"
ENDPOINTS = "GET /health, GET /model, POST /recommend, POST /similar, POST /embed"

log = logging.getLogger("uvicorn.error")  # the server log uvicorn already writes
_local = threading.local()


# ---- request models -----------------------------------------------------------------------------
def _id(value):
    """An id as the run's methods take it: a whole number (int64) or non-empty text."""
    if isinstance(value, int) and not isinstance(value, bool) and INT64[0] <= value <= INT64[1]:
        return value
    if isinstance(value, str) and 0 < len(value) <= MAX_ID_TEXT:
        return value
    raise ValueError(f"an id is a whole number or text of 1 to {MAX_ID_TEXT} characters, got {_shown(value)}")


def _scalar(value):
    """One feature or context value: text, a number, true/false or null."""
    if value is None or isinstance(value, bool):
        return value
    if isinstance(value, int) and INT64[0] <= value <= INT64[1]:
        return value
    if isinstance(value, float) and np.isfinite(value):
        return value
    if isinstance(value, str) and len(value) <= MAX_TEXT:
        return value
    raise ValueError(f"a value is text (up to {MAX_TEXT:,} characters), a finite number, true, false or null, "
                     f"got {_shown(value)}")


def _cell(value):
    """One cell of a feature row: a value, or a list of values (tokens, a vector)."""
    if isinstance(value, list):
        if len(value) > MAX_LIST:
            raise ValueError(f"a list value holds at most {MAX_LIST} values, got {len(value)}")
        return [_scalar(v) for v in value]
    return _scalar(value)


def _shown(value) -> str:
    text = json.dumps(value) if isinstance(value, (int, float, str, bool, type(None))) else type(value).__name__
    return text if len(text) <= 40 else text[:37] + "..."


Id = Annotated[int | str, PlainValidator(_id)]
Scalar = Annotated[Any, PlainValidator(_scalar)]
Cell = Annotated[Any, PlainValidator(_cell)]
Top = Annotated[int, Field(strict=True, ge=1, le=MAX_TOP)]
Ids = Annotated[list[Id], Field(min_length=1, max_length=MAX_IDS)]
History = Annotated[list[Id], Field(min_length=1, max_length=MAX_HISTORY)]
Row = Annotated[dict[str, Cell], Field(max_length=MAX_COLUMNS)]
Context = Annotated[dict[str, Scalar], Field(max_length=MAX_COLUMNS)]
Columns = Annotated[list[Annotated[str, Field(min_length=1, max_length=MAX_ID_TEXT)]], Field(max_length=MAX_COLUMNS)]
Values = Annotated[dict[str, Annotated[list[Scalar], Field(max_length=MAX_LIST)] | Scalar], Field(max_length=MAX_COLUMNS)]


class _Request(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)


class KeepRequest(_Request):
    """An item filter (towers.runs.lists.ItemFilter.from_dict's keys)."""

    only_true: Columns | None = None
    only_values: Values | None = None
    never_values: Values | None = None
    never_ids: Annotated[list[Id], Field(max_length=MAX_HISTORY)] | None = None


class _ListRequest(_Request):
    top: Top = 10
    columns: Columns = []
    keep: KeepRequest | None = None

    def list_options(self) -> dict:
        """columns= and keep= of the run's list methods."""
        keep = None if self.keep is None else ItemFilter.from_dict(self.keep.model_dump(exclude_none=True))
        return {"columns": list(self.columns), "keep": keep}


class RecommendRequest(_ListRequest):
    users: Ids | None = None
    history: History | None = None
    user_row: Row | None = None
    context: Context | None = None

    @model_validator(mode="after")
    def _one_query(self):
        if (self.users is None) == (self.history is None and self.user_row is None) or \
                (self.users is not None and self.history is not None):
            raise ValueError("give one of 'users' (ids of the run's users), 'history' (item ids of a new user) or "
                             "'user_row' (a new user's feature row, with or without 'history')")
        if self.user_row is not None and self.context is not None:
            raise ValueError("'context' goes with 'users' or 'history', not with 'user_row'")
        return self


class SimilarRequest(_ListRequest):
    items: Ids | None = None
    item_row: Row | None = None

    @model_validator(mode="after")
    def _one_query(self):
        if (self.items is None) == (self.item_row is None):
            raise ValueError("give either 'items' (ids of the run's items) or 'item_row' (a new item's feature row)")
        return self


class EmbedRequest(_Request):
    side: Literal["items", "users"]
    rows: Annotated[list[Row], Field(min_length=1, max_length=MAX_ROWS)]
    history: Annotated[list[Annotated[list[Id], Field(max_length=MAX_HISTORY)]], Field(max_length=MAX_ROWS)] | None = None

    @model_validator(mode="after")
    def _history_for_users(self):
        if self.history is not None and self.side != "users":
            raise ValueError("'history' gives users' items; use it with \"side\": \"users\"")
        return self


# ---- answers ------------------------------------------------------------------------------------
def _plain(value):
    """A value of a list table as JSON takes it: numpy scalars and arrays as Python ones, missing as None."""
    if isinstance(value, np.ndarray):
        return [_plain(v) for v in value.tolist()]
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if value is None or value is pd.NA or value is pd.NaT or (isinstance(value, float) and not np.isfinite(value)):
        return None
    if isinstance(value, (pd.Timestamp, np.datetime64)) or hasattr(value, "isoformat"):
        return value.isoformat()
    return value


def ranked_lists(frame: pd.DataFrame) -> list[dict]:
    """A recommend or similar table as one list per query, in the table's order (each starts at rank 1); the
    item columns asked for sit beside rank, item_id and score."""
    lists: list[dict] = []
    extra = [c for c in frame.columns if c not in LIST_COLUMNS]
    values = [frame[c].tolist() for c in extra]
    for at, (query, rank, item, score) in enumerate(zip(frame["query_id"].tolist(), frame["rank"].tolist(),
                                                        frame["item_id"].tolist(), frame["score"].tolist())):
        if rank == 1:
            lists.append({"query_id": _plain(query), "items": []})
        entry = {"rank": rank, "item_id": _plain(item), "score": score}
        for name, column in zip(extra, values):
            entry[name] = _plain(column[at])
        lists[-1]["items"].append(entry)
    return lists


def embedded_rows(frame: pd.DataFrame) -> list[dict]:
    """An embed_items / embed_users table as one object per row: id, embedding and (with biases) bias."""
    ids = [_plain(i) for i in frame["id"].tolist()]
    vectors = frame.attrs["vectors"].tolist()
    bias = frame.attrs["bias"]
    if bias is None:
        return [{"id": i, "embedding": v} for i, v in zip(ids, vectors)]
    return [{"id": i, "embedding": v, "bias": b} for i, v, b in zip(ids, vectors, bias.tolist())]


def _error(status: int, message: str, headers: dict | None = None) -> Response:
    return Response(json.dumps({"error": message}), status_code=status, media_type="application/json",
                    headers=headers)


REQUESTS = {"/recommend": RecommendRequest, "/similar": SimilarRequest, "/embed": EmbedRequest}


def _extra_field_hint(field: str, parent: tuple, path: str) -> str:
    """For a field the endpoint does not take: the closest name the body (or its `keep`) does take, or the
    endpoint that takes this one."""
    model = KeepRequest if "keep" in parent else REQUESTS.get(path)
    if model is None:
        return ""
    close = [c for c in difflib.get_close_matches(field, sorted(model.model_fields), n=1) if c != field]
    if close:
        return f"; did you mean '{close[0]}'?"
    elsewhere = [p for p, other in REQUESTS.items() if p != path and field in other.model_fields]
    return f"; {elsewhere[0]} takes it" if elsewhere and model is not KeepRequest else ""


def _validation_message(errors: list[dict], path: str = "") -> tuple[int, str]:
    """(status, one line) for pydantic's errors of a request body."""
    first = errors[0]
    where = ".".join(str(p) for p in first["loc"] if p != "body")
    if first["type"] == "json_invalid":
        return 400, f"request body is not valid JSON ({first.get('ctx', {}).get('error', 'parse error')}); send a JSON object"
    if not where and first["type"] == "missing":
        return 400, "request body is missing; send a JSON object"
    if not where and first["type"] in ("model_type", "model_attributes_type", "dict_type"):
        return 422, "request body must be a JSON object of the endpoint's fields"
    message = first["msg"].removeprefix("Value error, ")
    if first["type"] == "extra_forbidden":  # a misspelt field: name the closest the endpoint takes
        message = "not a field of this request" + _extra_field_hint(str(first["loc"][-1]), tuple(first["loc"][:-1]),
                                                                     path)
    line = f"{where}: {message}" if where else f"request body: {message}"
    more = len(errors) - 1
    return 422, line + (f" (and {more} more problem{'s' if more != 1 else ''})" if more else "")


# the command-line options the library's messages name, as a request names them
_AS_FIELDS = {"--history": "'history'", "--user-rows": "'user_row'", "--item-rows": "'item_row'"}


def _towers_message(exc: TowersError, hidden: dict[str, str]) -> str:
    """The library's one line, with the server's own paths (hidden: path -> plain words) left out and the
    command line's options named as the request's fields."""
    text = _without_paths(str(exc).splitlines()[0], hidden)
    for option, field in _AS_FIELDS.items():
        text = re.sub(rf"{option}\b", field, text)
    return text


def _without_paths(text: str, hidden: dict[str, str]) -> str:
    """An error's or a note's text with the server's own paths (hidden: path -> plain words) in plain words."""
    for path, words in sorted(hidden.items(), key=lambda item: -len(item[0])):  # a table inside the run folder first
        text = text.removeprefix(f"{path}: ").replace(path, words)
    return text


def collect_notes(previous):
    """A warnings.showwarning that gives a worker thread's warnings to its request's notes, others to `previous`."""

    def show(message, category, filename, lineno, file=None, line=None):
        notes = getattr(_local, "notes", None)
        if notes is None:
            previous(message, category, filename, lineno, file, line)
        else:
            notes.append(str(message))

    return show


def _in_worker(work, hidden: dict[str, str] | None = None) -> bytes:
    """Run one request's work on this worker thread: torch on one thread, warnings kept as the answer's notes
    (the server's paths in them put in plain words, as in errors)."""
    if not getattr(_local, "one_thread", False):
        torch.set_num_threads(1)  # per thread; requests in parallel, not each product
        _local.one_thread = True
    _local.notes = []
    try:
        body = work()
        body["notes"] = list(dict.fromkeys(_without_paths(note, hidden or {}) for note in _local.notes))
    finally:
        _local.notes = None
    return json.dumps(body, allow_nan=False, separators=(",", ":")).encode()


def warm_up(run) -> None:
    """Read every file the requests need, build the history table and load the compiled kernels, once.

    After this the run's caches are full, so concurrent requests only read them, and the first
    request costs what any other does.
    """
    items = run.embeddings("item")[0]
    queries = run.embeddings("query" if run.item_item else "user")[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # about the warm-up's own requests
        run.similar(items[:1], top=1)
        run.recommend(queries[:1], top=1)
        if not run.item_item and run.bundle.model_cfg.history_length > 0:
            run.recommend_history(items[:1], top=1)


# ---- the application --------------------------------------------------------------------------------
class _BodyCheck:
    """ASGI middleware: a body that is not JSON gets 415, and one over `limit` bytes 413, before the app reads it."""

    def __init__(self, app, limit: int):
        self.app, self.limit = app, limit

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = dict(scope["headers"])
        kind = headers.get(b"content-type", b"application/json").split(b";")[0].strip().lower()
        if kind != b"application/json" and not kind.endswith(b"+json"):
            await _refuse(send, 415, f"the request body is {kind.decode('latin-1')!r}; send JSON with the header "
                                     "Content-Type: application/json")
            return
        too_large = f"request body is larger than {self.limit:,} bytes; send fewer ids or rows per request"
        declared = headers.get(b"content-length")
        if declared is not None and (not declared.isdigit() or int(declared) > DRAIN_BYTES):
            await _refuse(send, 413, too_large)  # not worth reading: the client may see the connection reset
            return
        chunks, size = [], 0
        while True:
            message = await receive()
            if message["type"] == "http.disconnect":
                return
            size += len(message.get("body", b""))
            if size <= self.limit:
                chunks.append(message.get("body", b""))
            elif size > DRAIN_BYTES:
                break
            if not message.get("more_body", False):
                break
        if size > self.limit:  # read to the end (up to DRAIN_BYTES) so that the client can read the answer
            await _refuse(send, 413, too_large)
            return
        body, given = b"".join(chunks), False

        async def replay():
            nonlocal given
            if given:
                return await receive()
            given = True
            return {"type": "http.request", "body": body, "more_body": False}

        await self.app(scope, replay, send)


async def _refuse(send, status: int, message: str) -> None:
    """An error answer sent straight from the middleware; the connection closes (its body may be unread)."""
    body = json.dumps({"error": message}).encode()
    await send({"type": "http.response.start", "status": status,
                "headers": [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode()),
                            (b"connection", b"close")]})
    await send({"type": "http.response.body", "body": body})


def make_app(run, threads: int, item_table=None) -> FastAPI:
    """The FastAPI application serving `run` (a loaded towers.Run) on `threads` worker threads; item_table: the
    table that item columns and filters read (default: the run's config items.path), read again when it changes."""
    warm_up(run)
    summary = api.describe(run)
    limiter = anyio.CapacityLimiter(threads)
    shared_lock = threading.Lock()
    table = item_table if item_table is not None else (run.config.items.path if run.config and run.config.items else None)
    hidden = {str(run.dir): "the run"} | ({str(Path(table)): "the item table"} if table else {})
    app = FastAPI(title="towers", docs_url=None, redoc_url=None, openapi_url=None,
                  redirect_slashes=False)  # "/recommend/" is a JSON 404 naming the endpoints, not a bare 307
    app.add_middleware(_BodyCheck, limit=MAX_BODY_BYTES)

    async def answer(work, what: str, shared: bool = False) -> Response:
        if shared:  # see the module's docstring
            inner = work

            def work():
                with shared_lock:
                    return inner()
        try:
            body = await anyio.to_thread.run_sync(_in_worker, work, hidden, limiter=limiter)
        except TowersError as exc:
            return _error(422, _towers_message(exc, hidden))
        except Exception:
            log.exception("internal error answering %s", what)  # the traceback, never the request body
            return _error(500, INTERNAL)
        return Response(body, media_type="application/json")

    @app.exception_handler(RequestValidationError)
    async def _invalid(request, exc):
        status, message = _validation_message(exc.errors(), request.url.path)
        return _error(status, message)

    @app.exception_handler(HTTPException)
    async def _http(request, exc):
        if exc.status_code == 404:
            return _error(404, f"no endpoint {request.url.path}; the endpoints are {ENDPOINTS}")
        if exc.status_code == 405:
            return _error(405, f"{request.method} is not allowed on {request.url.path}; the endpoints are {ENDPOINTS}",
                          exc.headers)
        if exc.status_code == 400:  # FastAPI could not decode the body (not UTF-8, nested too deep)
            return _error(400, "request body could not be read as JSON (not UTF-8, or nested too deeply); send a "
                               "JSON object")
        return _error(exc.status_code, str(exc.detail), exc.headers)

    @app.exception_handler(Exception)
    async def _internal(request, exc):
        log.error("internal error answering %s %s", request.method, request.url.path, exc_info=exc)
        return _error(500, INTERNAL)

    @app.get("/health")
    async def health():
        return {"status": "ok", "run": run.dir.name}

    @app.get("/model")
    async def model():
        return summary

    @app.post("/recommend")
    async def recommend(req: RecommendRequest):
        def work():
            options = req.list_options() | {"item_table": item_table}
            if req.users is not None:
                frame = run.recommend(req.users, req.top, context=req.context, **options)
            elif req.user_row is None:
                frame = run.recommend_history(req.history, req.top, context=req.context, **options)
            else:
                row = pd.DataFrame.from_records([req.user_row])
                if req.history is not None:
                    row[HISTORY] = pd.Series([req.history], dtype=object)
                frame = run.recommend_rows(row, req.top, history_column=HISTORY if req.history is not None else None,
                                           source="user_row", **options)
            return {"lists": ranked_lists(frame)}

        return await answer(work, "POST /recommend", shared=req.user_row is not None)

    @app.post("/similar")
    async def similar(req: SimilarRequest):
        def work():
            options = req.list_options() | {"item_table": item_table}
            if req.items is not None:
                frame = run.similar(req.items, req.top, **options)
            else:
                frame = run.similar_rows(pd.DataFrame.from_records([req.item_row]), req.top, source="item_row", **options)
            return {"lists": ranked_lists(frame)}

        return await answer(work, "POST /similar", shared=req.item_row is not None)

    @app.post("/embed")
    async def embed(req: EmbedRequest):
        def work():
            rows = pd.DataFrame.from_records(req.rows)
            frame = run.embed_items(rows) if req.side == "items" else run.embed_users(rows, history=req.history)
            return {"embeddings": embedded_rows(frame)}

        return await answer(work, "POST /embed", shared=True)

    return app
