"""The maintained-server candidate ``demur bench`` measures against the loop front.

uvicorn (HTTP parsed by httptools) under gunicorn's process management (the
``uvicorn-worker`` package's ``UvicornWorker``), with a small asyncio batcher for predict and
the same Flask app mounted through a WSGI adapter (``a2wsgi``) for every other route. It uses
the production pieces unchanged: ``create_app`` composition, ``Runtime.answer`` and the
predict checks and headers of serve/web/predict_http.py. Only the bytes-moving differs, so
the comparison measures the server, not the pipeline.

Kept with the benchmark, not in the runtime: the loop front is the one production front
unless a run shows this within 15% of its one-case requests/s (serve/web/loop/worker.py has
the measured reason). Start it the way the benchmark does::

    gunicorn -k uvicorn_worker.UvicornWorker --workers 2 'demur.export.bench.asgi:app_from_environment()'
"""

from __future__ import annotations

import asyncio
import logging
import os
from typing import Any

from demur.serve.config import build_config
from demur.serve.errors import DemurError
from demur.serve.web.predict_http import PREDICT_PATH, admit, refusal, reply

__all__ = ["app_from_environment", "asgi_app"]

log = logging.getLogger("demur.bench.asgi")

Scope = dict[str, Any]


def asgi_app(flask_app: Any) -> Any:
    """An ASGI callable: predict answered in batches on the event loop, the rest via ``flask_app``."""
    from a2wsgi import WSGIMiddleware

    from demur.serve.web.app import runtime_of
    from demur.serve.web.auth import tokens_of

    runtime = runtime_of(flask_app)
    tokens = tokens_of(flask_app)
    config = runtime.config
    other = WSGIMiddleware(flask_app, workers=max(1, config.threads))
    pending: list[tuple[Any, asyncio.Future[tuple[int, list[tuple[str, str]], bytes]]]] = []
    scheduled = False

    def flush() -> None:
        nonlocal scheduled
        scheduled = False
        batch, pending[:] = list(pending), []
        by_caller: dict[str | None, list[int]] = {}
        for i, (admitted, _) in enumerate(batch):
            by_caller.setdefault(admitted.caller, []).append(i)
        for caller, members in by_caller.items():
            live: Any = None
            try:
                live, answers = runtime.answer([batch[i][0].body for i in members], caller=caller)
            except DemurError as exc:
                answers = [exc] * len(members)
            for i, answer in zip(members, answers):
                future = batch[i][1]
                if not future.done():
                    future.set_result(reply(answer, live))

    async def read_body(receive: Any) -> bytes:
        chunks: list[bytes] = []
        more = True
        while more:
            message = await receive()
            chunks.append(message.get("body", b""))
            more = message.get("more_body", False)
        return b"".join(chunks)

    async def send_answer(send: Any, answer: tuple[int, list[tuple[str, str]], bytes]) -> None:
        status, headers, body = answer
        raw = [(b"content-type", b"application/json"), *((k.lower().encode("latin-1"), v.encode("latin-1"))
                                                          for k, v in headers)]
        await send({"type": "http.response.start", "status": status, "headers": raw})
        await send({"type": "http.response.body", "body": body})

    async def app(scope: Scope, receive: Any, send: Any) -> None:
        nonlocal scheduled
        if scope["type"] == "lifespan":
            while True:
                message = await receive()
                if message["type"] == "lifespan.startup":
                    await send({"type": "lifespan.startup.complete"})
                elif message["type"] == "lifespan.shutdown":
                    await send({"type": "lifespan.shutdown.complete"})
                    return
        if scope["type"] != "http" or scope["path"] != PREDICT_PATH or scope["method"] != "POST":
            await other(scope, receive, send)
            return
        headers = {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope["headers"]}
        body = await read_body(receive)
        try:
            admitted = admit(headers.get, body, tokens=tokens, config=config, waiting=len(pending))
        except DemurError as exc:
            await send_answer(send, refusal(exc))
            return
        future: asyncio.Future[tuple[int, list[tuple[str, str]], bytes]] = asyncio.get_running_loop().create_future()
        pending.append((admitted, future))
        if not scheduled:
            scheduled = True
            asyncio.get_running_loop().call_soon(flush)
        await send_answer(send, await future)

    return app


def app_from_environment() -> Any:
    """gunicorn factory: the production composition (``build_app``) from ``DEMUR_*``, wrapped."""
    from demur.serve.web.server import build_app

    config = build_config(os.environ.get("DEMUR_CONFIG") or None, os.environ)
    return asgi_app(build_app(config, master_pid=os.getppid()))
