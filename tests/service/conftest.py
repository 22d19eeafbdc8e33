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


@pytest.fixture(scope="session")
def kafka_bootstrap(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """host:port of a fresh single-node broker for this test session."""
    env = dict(
        os.environ,
        BARSMITH_KAFKA_PORT=str(free_port_pair()),
        BARSMITH_KAFKA_WORK=str(tmp_path_factory.mktemp("kafka")),
    )
    done = subprocess.run([str(BROKER), "start"], env=env, capture_output=True, text=True, timeout=900)
    if done.returncode != 0:
        message = f"the Kafka broker did not start:\n{done.stderr[-3000:]}"
        if os.environ.get("CI") == "true":
            pytest.fail(message)
        pytest.skip(message)
    try:
        yield done.stdout.strip().splitlines()[-1]
    finally:
        subprocess.run([str(BROKER), "stop"], env=env, capture_output=True, text=True, timeout=120)
