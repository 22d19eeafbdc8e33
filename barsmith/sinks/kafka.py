"""Bus sink: bars to a Kafka topic.

Key: the symbol (UTF-8). Value: a msgpack map with exactly the Parquet bar columns,
timestamps as int ns since the epoch. Header ``spec``: the bar spec. The producer
is idempotent (no duplicates from its own retries) and compresses batches.
"""

from __future__ import annotations

import asyncio
import functools
import logging
import time
from collections.abc import Callable, Sequence
from typing import Any

import msgpack

from barsmith.bars.bar import Bar
from barsmith.errors import SinkError
from barsmith.settings import KafkaSettings
from barsmith.sources.kafka import security_kwargs

log = logging.getLogger("barsmith.bus")


def encode_bar(bar: Bar) -> bytes:
    """The bus value of a bar: a msgpack map of the bar columns."""
    return bytes(msgpack.packb(bar.as_dict(), use_bin_type=True))


def decode_bar(value: bytes) -> dict[str, Any]:
    """Inverse of :func:`encode_bar` (for consumers and tests)."""
    decoded: dict[str, Any] = msgpack.unpackb(value, raw=False)
    return decoded


class KafkaBarSink:
    """Publishes bars to ``topic``; ``flush()`` waits until the broker has them all."""

    name = "bus"

    def __init__(
        self,
        kafka: KafkaSettings,
        topic: str,
        on_published: Callable[[Bar, float], None] | None = None,
    ) -> None:
        self._kafka = kafka
        self.topic = topic
        self._producer: Any = None
        self._inflight: set[asyncio.Future[Any]] = set()
        self._error: str | None = None
        self.on_published = on_published
        self.published = 0

    async def start(self) -> None:
        from aiokafka import AIOKafkaProducer
        from aiokafka.errors import KafkaError

        kafka = self._kafka
        compression = None if kafka.output_compression == "none" else kafka.output_compression
        self._producer = AIOKafkaProducer(
            bootstrap_servers=kafka.bootstrap_servers,
            client_id=f"{kafka.client_id}-bars",
            enable_idempotence=True,
            acks="all",
            compression_type=compression,
            linger_ms=kafka.output_linger_ms,
            **security_kwargs(kafka),
        )
        try:
            await self._producer.start()
        except KafkaError as exc:
            await self._producer.stop()
            raise SinkError(f"cannot start the bar producer: {exc}") from exc

    async def publish(self, bars: Sequence[Bar]) -> None:
        self._raise_delivery_error()
        if self._producer is None:
            await self.start()
        closed_at = time.monotonic()
        send = self._producer.send
        try:
            for bar in bars:
                future = await send(
                    self.topic,
                    value=encode_bar(bar),
                    key=bar.symbol.encode("utf-8"),
                    headers=[("spec", bar.spec.encode("utf-8"))],
                )
                self._inflight.add(future)
                future.add_done_callback(functools.partial(self._delivered, bar, closed_at))
        except Exception as exc:
            raise SinkError(f"cannot publish bars to {self.topic}: {exc}") from exc

    def _delivered(self, bar: Bar, closed_at: float, future: asyncio.Future[Any]) -> None:
        self._inflight.discard(future)
        if future.cancelled():
            self._error = self._error or "delivery cancelled"
            return
        exc = future.exception()
        if exc is not None:
            self._error = self._error or str(exc)
            return
        self.published += 1
        if self.on_published is not None:
            self.on_published(bar, time.monotonic() - closed_at)

    def _raise_delivery_error(self) -> None:
        if self._error is not None:
            error, self._error = self._error, None
            raise SinkError(f"the broker did not take bars for {self.topic}: {error}")

    async def flush(self) -> None:
        if self._producer is None:
            return
        if self._inflight:
            await asyncio.gather(*list(self._inflight), return_exceptions=True)
        self._raise_delivery_error()

    async def close(self) -> None:
        if self._producer is None:
            return
        try:
            await self.flush()
        finally:
            await self._producer.stop()
            self._producer = None
