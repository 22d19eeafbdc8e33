"""aiokafka clients, made one way: connection and security arguments, producers,
consumers, admin clients, starting and stopping them, and which failures are the bus's.

Every client barsmith makes comes from here, so a security setting reaches all of
them; a client that cannot start is stopped again and reported as one of
barsmith's own errors, with the Kafka error chained.
"""

from __future__ import annotations

import asyncio
import contextlib
from typing import Any

from barsmith.errors import BarsmithError, InputError
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


def bar_producer(kafka: KafkaSettings, client_id: str, **options: Any) -> Any:
    """A producer of bars: idempotent, compressed and lingering as the output settings say
    (``options``: e.g. a ``transactional_id``)."""
    compression = None if kafka.output_compression == "none" else kafka.output_compression
    return new_producer(
        kafka, client_id, acks="all", compression_type=compression, linger_ms=kafka.output_linger_ms, **options
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
    it again and raise ``error``, the Kafka error chained."""
    from aiokafka.errors import KafkaError

    try:
        await client.start()
    except KafkaError as exc:
        await stop_client(client)
        servers = ", ".join(kafka.bootstrap_servers)
        raise error(f"cannot reach Kafka at {servers} ({what}): {exc}") from exc


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
