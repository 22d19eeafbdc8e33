"""Topics barsmith creates, on a real broker: partitions as asked, and the replication
factor of the settings — by default the broker's own default.replication.factor."""

from __future__ import annotations

import pytest

from barsmith.bus.clients import new_admin, start_client
from barsmith.bus.topics import ensure_topic
from barsmith.errors import ConfigError
from barsmith.settings import KafkaSettings, load_settings


def kafka(bootstrap: str, **extra: object) -> KafkaSettings:
    return load_settings(kafka={"bootstrap_servers": [bootstrap], **extra}).kafka


async def replicas_and_default(settings: KafkaSettings, topic: str) -> tuple[list[int], int]:
    """Each partition's replica count, and the broker's default.replication.factor."""
    from aiokafka.admin.config_resource import ConfigResource, ConfigResourceType

    admin = new_admin(settings, "test-admin")
    await start_client(admin, settings, "admin client")
    try:
        (entry,) = await admin.describe_topics([topic])
        replicas = [len(p["replicas"]) for p in entry["partitions"]]
        broker = entry["partitions"][0]["leader"]
        (response,) = await admin.describe_configs([ConfigResource(ConfigResourceType.BROKER, str(broker))])
        configs = {c[0]: c[1] for resource in response.resources for c in resource[4]}
        return replicas, int(configs["default.replication.factor"])
    finally:
        await admin.close()


async def test_an_unset_replication_factor_is_the_brokers_default(kafka_bootstrap: str) -> None:
    settings = kafka(kafka_bootstrap)
    assert settings.replication_factor is None
    assert await ensure_topic(settings, "rf-default", 3) == 3
    replicas, default = await replicas_and_default(settings, "rf-default")
    assert replicas == [default] * 3


async def test_the_replication_factor_setting_reaches_the_broker(kafka_bootstrap: str) -> None:
    # One broker cannot hold two replicas: the broker's refusal proves the setting was sent.
    with pytest.raises(ConfigError, match=r"refused to create topic 'rf-two' \(3 partitions, 2 replicas\)"):
        await ensure_topic(kafka(kafka_bootstrap, replication_factor=2), "rf-two", 3)
    assert await ensure_topic(kafka(kafka_bootstrap, replication_factor=1), "rf-one", 2) == 2
    replicas, _ = await replicas_and_default(kafka(kafka_bootstrap), "rf-one")
    assert replicas == [1, 1]


def test_a_replication_factor_below_one_is_refused() -> None:
    with pytest.raises(ConfigError, match=r"kafka\.replication_factor: must be at least 1, got 0"):
        load_settings(kafka={"replication_factor": 0})
