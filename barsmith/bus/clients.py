"""aiokafka clients, made one way: connection and security arguments, producers,
consumers, admin clients, starting and stopping them, and which failures are the bus's.

Every client barsmith makes comes from here, so a security setting reaches all of
them; a client that cannot start is stopped again and reported as one of
barsmith's own errors, with the Kafka error chained.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import os
import socket
import ssl
from typing import TYPE_CHECKING, Any

from barsmith.errors import BarsmithError, InputError, describe_error

if TYPE_CHECKING:
    from barsmith.settings import KafkaSettings

_STOP_TIMEOUT_S = 10.0


def client_kwargs(kafka: KafkaSettings) -> dict[str, Any]:
    """The bootstrap servers and security settings as aiokafka arguments (every client takes them)."""
    sec = kafka.security
    kwargs: dict[str, Any] = {"bootstrap_servers": kafka.bootstrap_servers, "security_protocol": sec.protocol}
    if sec.protocol.endswith("SSL"):
        from aiokafka.helpers import create_ssl_context

        kwargs["ssl_context"] = create_ssl_context(
            cafile=str(sec.ssl_cafile) if sec.ssl_cafile else None,
            certfile=str(sec.ssl_certfile) if sec.ssl_certfile else None,
            keyfile=str(sec.ssl_keyfile) if sec.ssl_keyfile else None,
            password=sec.ssl_key_password.get_secret_value() if sec.ssl_key_password else None,
        )
    if sec.protocol.startswith("SASL"):
        kwargs["sasl_mechanism"] = sec.sasl_mechanism
        kwargs["sasl_plain_username"] = sec.sasl_username
        kwargs["sasl_plain_password"] = sec.sasl_password.get_secret_value() if sec.sasl_password else None
    return kwargs


def new_producer(kafka: KafkaSettings, client_id: str, **options: Any) -> Any:
    """An idempotent producer (acks=all; no duplicates from its own retries); ``options``
    are aiokafka's producer arguments."""
    from aiokafka import AIOKafkaProducer

    return AIOKafkaProducer(client_id=client_id, enable_idempotence=True, **client_kwargs(kafka), **options)


# A bar is ~400 bytes before compression, and an input partition's bars all go to one or
# two output partitions (the same symbol rule): at the client's default 16 KiB a batch
# held ~40 of them, so one delivery filled several and waited a broker round trip for
# each. 256 KiB (uncompressed) stays well under the broker's 1 MiB message limit.
BAR_BATCH_BYTES = 256 * 1024


def bar_producer(kafka: KafkaSettings, client_id: str, **options: Any) -> Any:
    """A producer of bars: idempotent, compressed and lingering as the output settings say,
    in record batches of up to :data:`BAR_BATCH_BYTES` (``options``: e.g. a ``transactional_id``)."""
    compression = None if kafka.output_compression == "none" else kafka.output_compression
    return new_producer(
        kafka,
        client_id,
        acks="all",
        compression_type=compression,
        linger_ms=kafka.output_linger_ms,
        max_batch_size=BAR_BATCH_BYTES,
        **options,
    )


def new_consumer(kafka: KafkaSettings, client_id: str, *topics: str, **options: Any) -> Any:
    """A consumer that commits only when told to and reads only committed transactions
    (``read_committed``); ``options`` are aiokafka's consumer arguments."""
    from aiokafka import AIOKafkaConsumer

    return AIOKafkaConsumer(
        *topics,
        client_id=client_id,
        enable_auto_commit=False,
        isolation_level="read_committed",
        **client_kwargs(kafka),
        **options,
    )


def new_admin(kafka: KafkaSettings, client_id: str) -> Any:
    """An admin client (topic metadata and creation)."""
    from aiokafka.admin import AIOKafkaAdminClient

    return AIOKafkaAdminClient(client_id=client_id, **client_kwargs(kafka))


async def start_client(client: Any, kafka: KafkaSettings, what: str, error: type[BarsmithError] = InputError) -> None:
    """Start ``client`` (``what`` names it for the message); when the bus refuses, stop
    it again and raise ``error`` — one line in barsmith's words naming the bootstrap
    servers, the Kafka error chained. While it starts, the client library's own log
    lines are held back: on failure the error says it all, on success they are let
    through."""
    from aiokafka.errors import KafkaError

    with _HeldClientLogs() as held:
        try:
            await client.start()
        except KafkaError as exc:
            await stop_client(client)
            servers = ", ".join(kafka.bootstrap_servers)
            reason = _unreachable_reason(exc, held.exceptions())
            raise error(f"cannot reach Kafka at {servers} (the {what} could not start): {reason}") from exc
        held.release()


class _HeldClientLogs:
    """Holds back the records of the ``aiokafka`` loggers (nested uses share one
    handler). ``release()`` passes them on to the usual handlers; otherwise they are
    dropped when the last use ends."""

    _depth = 0
    _handler: _Holding | None = None
    _propagate = True

    def __enter__(self) -> _HeldClientLogs:
        cls = type(self)
        logger = logging.getLogger("aiokafka")
        if cls._depth == 0:
            cls._handler = _Holding()
            cls._propagate = logger.propagate
            logger.addHandler(cls._handler)
            logger.propagate = False
        cls._depth += 1
        assert cls._handler is not None
        self._handler = cls._handler
        self._first = len(cls._handler.records)
        return self

    def __exit__(self, *exc_info: object) -> None:
        cls = type(self)
        cls._depth -= 1
        if cls._depth == 0 and cls._handler is not None:
            logger = logging.getLogger("aiokafka")
            logger.removeHandler(cls._handler)
            logger.propagate = cls._propagate
            cls._handler = None

    def exceptions(self) -> list[BaseException]:
        """The exceptions the held records carry (what the client met while starting)."""
        assert self._handler is not None
        records = self._handler.records[self._first :]
        return [arg for record in records for arg in (record.args or ()) if isinstance(arg, BaseException)]

    def release(self) -> None:
        """Pass the held records on, as if never held (the client started after all)."""
        assert self._handler is not None
        records = self._handler.records[self._first :]
        del self._handler.records[self._first :]
        for record in records:
            if record.levelno >= logging.getLogger(record.name).getEffectiveLevel():
                logging.getLogger().handle(record)


class _Holding(logging.Handler):
    def __init__(self) -> None:
        super().__init__()
        self.records: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.records.append(record)


def _unreachable_reason(exc: BaseException, met: list[BaseException]) -> str:
    """Why a client could not start, in plain words: the connection errors it met
    (refused, unknown host, timed out, TLS), or the Kafka error's own description."""
    from aiokafka.errors import KafkaConnectionError

    reasons: list[str] = []
    for cause in [*met, exc.__cause__]:
        reason = _os_reason(cause) if cause is not None else None
        if reason and reason not in reasons:
            reasons.append(reason)
    if reasons:
        return "; ".join(reasons)
    if isinstance(exc, KafkaConnectionError):
        return "no broker answered"
    return describe_error(exc)


def _os_reason(exc: BaseException) -> str | None:
    if isinstance(exc, ssl.SSLError):
        return f"TLS failed ({exc.reason or exc.strerror or 'handshake'})"
    if isinstance(exc, socket.gaierror):
        return "host name not found"
    if isinstance(exc, TimeoutError | asyncio.TimeoutError):
        return "timed out"
    if isinstance(exc, OSError) and exc.errno:
        return os.strerror(exc.errno).lower()
    return None


async def stop_client(client: Any) -> None:
    """Stop a producer or consumer (close an admin client), giving up after a while: at
    that point its errors no longer matter."""
    from aiokafka.admin import AIOKafkaAdminClient

    stop = client.close if isinstance(client, AIOKafkaAdminClient) else client.stop
    with contextlib.suppress(Exception):
        await asyncio.wait_for(stop(), _STOP_TIMEOUT_S)


def _caused_by(exc: BaseException, kinds: type[BaseException] | tuple[type[BaseException], ...]) -> bool:
    """Whether ``exc`` or an exception it was raised from is one of ``kinds``."""
    seen: BaseException | None = exc
    while seen is not None:
        if isinstance(seen, kinds):
            return True
        seen = seen.__cause__
    return False


def is_bus_failure(exc: BaseException) -> bool:
    """A failure of the broker, the connection or a transaction (worth retrying or a
    rewind) rather than of barsmith's own code."""
    from aiokafka.errors import KafkaError

    return _caused_by(exc, (KafkaError, asyncio.TimeoutError, ConnectionError))


def is_fenced(exc: BaseException) -> bool:
    """Another producer took this producer's transactional id."""
    from aiokafka.errors import ProducerFenced

    return _caused_by(exc, ProducerFenced)
