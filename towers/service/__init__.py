"""`towers serve`: one trained run answering JSON requests over HTTP.

A thin layer like the CLI: each request is checked (towers/service/app.py, pydantic models), handed
to the run's own methods (towers.api / Run), and its answer returned as JSON. FastAPI and uvicorn
come with the optional `serve` extra; this module imports them only when a server starts, so the
rest of towers works without them.
"""

from __future__ import annotations

import os
import socket
import warnings
from pathlib import Path

from towers import api
from towers.errors import TowersError

EXTRA_MODULES = ("fastapi", "uvicorn", "pydantic", "starlette", "anyio")
INSTALL = "towers serve needs the serve extra (FastAPI and uvicorn); install it with: pip install 'towers[serve]'"


def default_threads() -> int:
    """Request threads when --threads is not given: one per core this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def listen(host: str, port: int) -> socket.socket:
    """A TCP socket bound to host:port (port 0: a free one) and listening; one line on failure."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    # IPPROTO_TCP named, not 0: asyncio sets TCP_NODELAY only on sockets whose proto says TCP, and without it
    # each answer on a kept-alive connection waited about 40 ms (Nagle's algorithm against delayed ACKs)
    sock = socket.socket(family, socket.SOCK_STREAM, socket.IPPROTO_TCP)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind((host, port))
        sock.listen(128)
    except OSError as exc:
        sock.close()
        raise TowersError(f"cannot listen on {host}:{port}: {exc.strerror or exc}; choose another --host or --port") \
            from None
    except (OverflowError, ValueError) as exc:  # a port outside 0-65535
        sock.close()
        raise TowersError(f"cannot listen on {host}:{port}: {exc}; give a --port from 0 to 65535") from None
    return sock


def serve(run_dir, host: str = "127.0.0.1", port: int = 8080, threads: int | None = None, item_table=None,
          announce=print, new_items=None) -> None:
    """Serve a run folder on host:port until Ctrl-C (returns) or SIGTERM (ends the process); blocks.

    The run is loaded and warmed up once (towers/service/app.py), then `threads` worker threads
    (default: one per core) answer requests, each running torch on one thread. `announce` gets one
    line with the address once the server listens. item_table: the table item columns and filters read
    (default: the run's config items.path), read again when its file changes. new_items: a file of feature rows
    of items not in the run, embedded once here and served beside the run's items (Run.with_new_items).
    """
    if threads is not None and threads < 1:
        raise TowersError(f"--threads must be a positive whole number, got {threads}")
    if item_table is not None and not Path(item_table).is_file():
        raise TowersError(f"{item_table}: no such file; give --item-table an item table (CSV or parquet)")
    try:
        import uvicorn

        from towers.service import app as service_app
    except ModuleNotFoundError as exc:
        if exc.name and exc.name.split(".")[0] in EXTRA_MODULES:
            raise TowersError(INSTALL) from None
        raise
    sock = listen(host, port)  # first, so a port in use fails before the run is loaded
    try:
        run = api.load(run_dir)
        if new_items is not None:
            run = run.with_new_items(new_items)
        threads = threads or default_threads()
        application = service_app.make_app(run, threads, item_table)
    except BaseException:
        sock.close()
        raise
    bound = sock.getsockname()[1]
    config = uvicorn.Config(application, log_level="info", access_log=True, timeout_graceful_shutdown=5,
                            server_header=False)
    class Server(uvicorn.Server):
        async def shutdown(self, sockets=None):  # Ctrl-C and SIGTERM alike: uvicorn re-raises SIGTERM after this
            await super().shutdown(sockets)
            announce("stopped")

    server = Server(config)
    with warnings.catch_warnings():
        # the library's warnings (unseen feature values, history ids left out) become the notes of the
        # request that raised them; see app.collect_notes
        warnings.simplefilter("always")
        warnings.showwarning = service_app.collect_notes(warnings.showwarning)
        announce(f"serving {run.dir} on http://{host}:{bound} with {threads} worker thread"
                 f"{'s' if threads != 1 else ''}; stop with Ctrl-C")
        try:
            server.run(sockets=[sock])
        except KeyboardInterrupt:  # uvicorn raises Ctrl-C again once it has shut down (and said "stopped")
            pass
        finally:
            sock.close()
