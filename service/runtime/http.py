"""A tiny HTTP endpoint for ``/metrics``, ``/healthz`` and ``/readyz``."""

from __future__ import annotations

import asyncio
from collections.abc import Callable

from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, generate_latest

__all__ = ["HealthServer"]


class HealthServer:
    """``/healthz``: the event loop answers. ``/readyz``: ``ready()`` is true
    (transport connected, streams loaded, none held); ``ready()`` may return
    ``(ok, reason)`` to say why in the body. ``/metrics``: Prometheus text."""

    def __init__(self, registry: CollectorRegistry, ready: Callable[[], bool | tuple[bool, str]], host: str, port: int) -> None:
        self.registry, self.ready, self.host, self.port = registry, ready, host, port
        self._server: asyncio.base_events.Server | None = None

    async def start(self) -> None:
        self._server = await asyncio.start_server(self._handle, self.host, self.port)
        self.port = self._server.sockets[0].getsockname()[1]

    async def stop(self) -> None:
        if self._server is not None:
            self._server.close()
            await self._server.wait_closed()
            self._server = None

    async def _handle(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            request = await asyncio.wait_for(reader.readline(), timeout=5)
            while (await asyncio.wait_for(reader.readline(), timeout=5)) not in (b"\r\n", b"\n", b""):
                pass
            parts = request.decode("latin-1").split()
            path = parts[1].split("?")[0] if len(parts) >= 2 else ""
            method = parts[0] if parts else ""
            if method not in ("GET", "HEAD"):
                status, ctype, body = "405 Method Not Allowed", "text/plain", b"only GET\n"
            elif path == "/metrics":
                status, ctype, body = "200 OK", CONTENT_TYPE_LATEST, generate_latest(self.registry)
            elif path == "/healthz":
                status, ctype, body = "200 OK", "text/plain", b"ok\n"
            elif path == "/readyz":
                answer = self.ready()
                ok, reason = answer if isinstance(answer, tuple) else (answer, "ready" if answer else "not ready")
                status = "200 OK" if ok else "503 Service Unavailable"
                ctype, body = "text/plain", reason.encode() + b"\n"
            else:
                status, ctype, body = "404 Not Found", "text/plain", b"not found\n"
            head = f"HTTP/1.1 {status}\r\nContent-Type: {ctype}\r\nContent-Length: {len(body)}\r\nConnection: close\r\n\r\n"
            writer.write(head.encode("latin-1") + (b"" if method == "HEAD" else body))
            await writer.drain()
        except (asyncio.TimeoutError, ConnectionError):
            pass
        finally:
            writer.close()
