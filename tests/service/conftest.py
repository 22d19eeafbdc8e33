"""A real Kafka broker for the service tests, started once per session by the project's
own script (deploy/kafka/broker: Apache Kafka in KRaft mode, no Docker).

In CI (CI=true) a broker that cannot start fails the run; elsewhere the broker tests
are skipped with the reason.
"""

from __future__ import annotations

import os
import subprocess
from collections.abc import Iterator
from pathlib import Path

import pytest
from factories import free_port_pair

ROOT = Path(__file__).resolve().parents[2]
BROKER = ROOT / "deploy" / "kafka" / "broker"


class Broker:
    """The session's broker, which a test may stop and start again (same port and data)."""

    def __init__(self, work: Path) -> None:
        self.env = dict(os.environ, BARSMITH_KAFKA_PORT=str(free_port_pair()), BARSMITH_KAFKA_WORK=str(work))
        self.bootstrap = ""

    def start(self) -> subprocess.CompletedProcess[str]:
        done = subprocess.run([str(BROKER), "start"], env=self.env, capture_output=True, text=True, timeout=900)
        if done.returncode == 0:
            self.bootstrap = done.stdout.strip().splitlines()[-1]
        return done

    def stop(self) -> None:
        subprocess.run([str(BROKER), "stop"], env=self.env, capture_output=True, text=True, timeout=120)


@pytest.fixture(scope="session", autouse=True)
def _feeds_from_an_invented_future() -> Iterator[None]:
    """The synthetic feeds are an invented session dated 2027-01-01. The live service
    rejects ticks far past the wall clock (README, "Event time"), so these tests run it
    without that limit -- in this process and in the services they start -- except where
    a test sets the limit itself."""
    key = "BARSMITH_EVENT_TIME__MAX_AHEAD_OF_WALL_S"
    old = os.environ.get(key)
    os.environ[key] = ""
    try:
        yield
    finally:
        if old is None:
            os.environ.pop(key, None)
        else:
            os.environ[key] = old


@pytest.fixture(scope="session")
def kafka_broker(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Broker]:
    """A fresh single-node broker for this test session."""
    broker = Broker(tmp_path_factory.mktemp("kafka"))
    done = broker.start()
    if done.returncode != 0:
        message = f"the Kafka broker did not start:\n{done.stderr[-3000:]}"
        if os.environ.get("CI") == "true":
            pytest.fail(message)
        pytest.skip(message)
    try:
        yield broker
    finally:
        broker.stop()


@pytest.fixture(scope="session")
def kafka_bootstrap(kafka_broker: Broker) -> str:
    """host:port of the session's broker."""
    return kafka_broker.bootstrap
