"""Topics and partitions: stream names, which partition a symbol's ticks live in, and
creating the topics barsmith needs.

``barsmith publish`` places each tick with :func:`partition_for` (the rule Kafka's
default producer partitioner uses), the bus sink places each bar with it, and
``barsmith replay --partitions N`` splits a recorded feed with it, so that a replay
builds exactly the bars the live service builds from the bus (one engine, and one
watermark, per partition).
"""

from __future__ import annotations

import functools
import logging
from typing import TYPE_CHECKING, Any

from barsmith.bus.clients import new_admin, start_client
from barsmith.errors import ConfigError
from barsmith.ingest.ticks import Tick

if TYPE_CHECKING:
    from barsmith.settings import KafkaSettings

log = logging.getLogger("barsmith.bus")


def stream_name(topic: str, partition: int) -> str:
    """The name of one input partition's ordered stream (its engine, checkpoint key, metrics label)."""
    return f"{topic}[{partition}]"


@functools.lru_cache(maxsize=65_536)
def partition_for(symbol: str | None, partitions: int) -> int:
    """murmur2 of the UTF-8 key, as Kafka's default partitioner; records without a
    symbol go to partition 0."""
    if symbol is None or partitions <= 1:
        return 0
    from aiokafka.partitioner import murmur2

    hashed: int = murmur2(symbol.encode("utf-8"))
    return (hashed & 0x7FFFFFFF) % partitions


def symbol_of(record: Any) -> str | None:
    """The ``sym`` of a decoded record (the first tick's, for a batch), if it has one."""
    if type(record) is Tick:
        return record.sym
    if type(record) is list:
        return symbol_of(record[0]) if record else None
    if type(record) is dict:
        sym = record.get("sym")
        return sym if type(sym) is str else None
    return None


async def _admin(kafka: KafkaSettings) -> Any:
    admin = new_admin(kafka, f"{kafka.client_id}-admin")
    await start_client(admin, kafka, "admin client")
    return admin


async def _partition_count(admin: Any, topic: str) -> int | None:
    for entry in await admin.describe_topics([topic]):
        if entry.get("topic") == topic and entry.get("error_code", 0) == 0 and entry.get("partitions"):
            return len(entry["partitions"])
    return None


async def topic_partitions(kafka: KafkaSettings, topic: str) -> int | None:
    """How many partitions ``topic`` has, or None when it does not exist."""
    admin = await _admin(kafka)
    try:
        return await _partition_count(admin, topic)
    finally:
        await admin.close()


# CreateTopics: "use the broker's default" for the replication factor (KIP-464; brokers >= 2.4).
BROKER_DEFAULT_REPLICATION = -1


async def ensure_topic(kafka: KafkaSettings, topic: str, partitions: int, configs: dict[str, str] | None = None) -> int:
    """Create ``topic`` with ``partitions`` partitions, ``kafka.replication_factor``
    replicas (unset: the broker's ``default.replication.factor``) and topic ``configs``
    if missing; returns its partition count. A refusal by the broker is a
    :class:`~barsmith.errors.ConfigError` saying why."""
    admin = await _admin(kafka)
    try:
        found = await _partition_count(admin, topic)
        if found is not None:
            if found != partitions:
                log.warning("topic %s exists with %d partitions (not %d); using it as it is", topic, found, partitions)
            return found
        await _create_topic(admin, kafka, topic, partitions, configs or {})
        return partitions
    finally:
        await admin.close()


async def _create_topic(admin: Any, kafka: KafkaSettings, topic: str, partitions: int, configs: dict[str, str]) -> None:
    from aiokafka.admin import NewTopic
    from aiokafka.errors import TopicAlreadyExistsError, for_code

    replicas = kafka.replication_factor
    new = NewTopic(topic, num_partitions=partitions, replication_factor=replicas or 1, topic_configs=configs)
    if replicas is None:
        # aiokafka's NewTopic refuses -1 without an explicit assignment, yet the broker
        # takes it (and Kafka 4.1 does so on the CreateTopics version aiokafka sends).
        new.replication_factor = BROKER_DEFAULT_REPLICATION
    response = await admin.create_topics([new])
    for name, code, message in _topic_errors(response):
        if code == 0 or name != topic:
            continue
        error = for_code(code)
        if error is TopicAlreadyExistsError:
            continue  # created meanwhile by someone else
        asked = f"{replicas} replicas" if replicas else "the broker's default replication factor"
        reason = message or getattr(error, "description", "") or error.__name__
        raise ConfigError(f"the broker refused to create topic {topic!r} ({partitions} partitions, {asked}): {reason}")
    log.info(
        "created topic %s: %d partitions, %s",
        topic,
        partitions,
        f"{replicas} replicas" if replicas else "broker default replicas",
    )


def _topic_errors(response: Any) -> list[tuple[str, int, str | None]]:
    """(topic, error code, message) of a CreateTopics response of any version."""
    out = []
    for entry in response.topic_errors:
        name, code = entry[0], entry[1]
        out.append((name, code, entry[2] if len(entry) > 2 else None))
    return out
