"""A minimal asyncio HTTP endpoint: ``/metrics``, ``/healthz``, ``/readyz``.

Small on purpose: three GET routes on the service's own event loop, so that the
metrics a scrape sees are consistent with the loop's state.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Callable

from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, generate_latest

log = logging.getLogger("barsmith.http")


class HealthServer:
    """Serves the registry and two probes; ``ready()`` decides ``/readyz``."""

    def __init__(self, registry: CollectorRegistry, ready: Callable[[], bool], host: str, port: int) -> None:
        self._registry = registry
        self._ready = ready
        self._host = host
        self._port = port
        self._server: asyncio.Server | None = None
        self.port: int | None = None

    async def start(self) -> None:
        self._server = await asyncio.start_server(self._handle, self._host, self._port)
        self.port = self._server.sockets[0].getsockname()[1]
        log.info("metrics and health on http://%s:%s/metrics", self._host, self.port)

    async def close(self) -> None:
        if self._server is not None:
            self._server.close()
            await self._server.wait_closed()
            self._server = None

    async def _handle(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            request = await asyncio.wait_for(reader.readline(), timeout=5)
            while (await asyncio.wait_for(reader.readline(), timeout=5)) not in (b"\r\n", b"\n", b""):
                pass  # headers are not needed
            parts = request.decode("latin-1").split()
            path = parts[1].split("?")[0] if len(parts) >= 2 else ""
            if len(parts) < 2 or parts[0] != "GET":
                status, body, kind = "405 Method Not Allowed", b"only GET\n", "text/plain"
            elif path == "/metrics":
                status, body, kind = "200 OK", generate_latest(self._registry), CONTENT_TYPE_LATEST
            elif path == "/healthz":
                status, body, kind = "200 OK", b"ok\n", "text/plain"
            elif path == "/readyz":
                ready = self._ready()
                status = "200 OK" if ready else "503 Service Unavailable"
                body, kind = (b"ready\n" if ready else b"not ready\n"), "text/plain"
            else:
                status, body, kind = "404 Not Found", b"not found\n", "text/plain"
            head = (
                f"HTTP/1.1 {status}\r\nContent-Type: {kind}\r\nContent-Length: {len(body)}\r\nConnection: close\r\n\r\n"
            )
            writer.write(head.encode("latin-1") + body)
            await writer.drain()
        except (TimeoutError, ConnectionError):
            pass
        finally:
            writer.close()
