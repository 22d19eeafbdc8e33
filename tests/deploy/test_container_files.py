"""The container files stay consistent with the code (no Docker engine runs here)."""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import pytest
import yaml
from prometheus_client import generate_latest
from prometheus_client.parser import text_string_to_metric_families
from pydantic import BaseModel

from barsmith.engine import EngineStats
from barsmith.service.metrics import PartitionView, ServiceMetrics
from barsmith.settings import DEFAULT_METRICS_PORT, Settings, load_settings

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
ROOT = DEPLOY.parent


def compose() -> dict[str, Any]:
    loaded: dict[str, Any] = yaml.safe_load((DEPLOY / "docker-compose.yml").read_text())
    return loaded


def barsmith_env() -> dict[str, str]:
    return {k: str(v) for k, v in compose()["services"]["barsmith"]["environment"].items()}


def resolves(model: type[BaseModel], parts: list[str]) -> bool:
    field = model.model_fields.get(parts[0])
    if field is None:
        return False
    if len(parts) == 1:
        return True
    nested = field.annotation
    return isinstance(nested, type) and issubclass(nested, BaseModel) and resolves(nested, parts[1:])


def test_every_barsmith_variable_is_a_known_setting() -> None:
    for name in barsmith_env():
        assert name.startswith("BARSMITH_")
        path = name.removeprefix("BARSMITH_").lower().split("__")
        assert resolves(Settings, path), f"{name} is not a barsmith setting"


def test_the_compose_settings_validate(monkeypatch: pytest.MonkeyPatch) -> None:
    for name, value in barsmith_env().items():
        monkeypatch.setenv(name, value)
    settings = load_settings()
    assert settings.kafka.output_topic == "bars"
    assert settings.bar_specs()


def test_ports_and_addresses_agree() -> None:
    services = compose()["services"]
    env = barsmith_env()
    metrics_port = int(env["BARSMITH_METRICS__PORT"])
    assert f"{metrics_port}:{metrics_port}" in services["barsmith"]["ports"]
    prometheus = yaml.safe_load((DEPLOY / "prometheus" / "prometheus.yml").read_text())
    targets = prometheus["scrape_configs"][0]["static_configs"][0]["targets"]
    assert targets == [f"barsmith:{metrics_port}"]
    dockerfile = (DEPLOY / "Dockerfile").read_text()
    assert f"EXPOSE {metrics_port}" in dockerfile
    assert f"127.0.0.1:{metrics_port}/healthz" in dockerfile
    assert re.search(r"^USER (?!root)\w+", dockerfile, re.M), "the image must not run as root"
    advertised = services["kafka"]["environment"]["KAFKA_ADVERTISED_LISTENERS"]
    bootstrap = json.loads(env["BARSMITH_KAFKA__BOOTSTRAP_SERVERS"])
    assert bootstrap == [advertised.split("://")[1]]
    topic_cmd = services["topics"]["command"]
    assert topic_cmd[topic_cmd.index("--topic") + 1] == json.loads(env["BARSMITH_KAFKA__INPUT_TOPICS"])[0]
    assert topic_cmd[topic_cmd.index("--partitions") + 1] == "8"
    publish = services["publisher"]["command"]
    assert publish[publish.index("--topic") + 1] == "ticks"
    # Live data for the demo: real-time pace, event times shifted to now (the idle rule and
    # the delay panels need event time near the wall clock; the wall-clock guard allows it).
    assert publish[publish.index("--speed") + 1] == "1" and "--shift-to-now" in publish
    assert (ROOT / publish[1].lstrip("/")).is_file()


def test_the_containers_use_the_default_metrics_port() -> None:
    """One port everywhere: the default, the compose file, Prometheus' target and the image."""
    assert int(barsmith_env()["BARSMITH_METRICS__PORT"]) == DEFAULT_METRICS_PORT
    assert f"BARSMITH_METRICS__PORT={DEFAULT_METRICS_PORT}" in (DEPLOY / "Dockerfile").read_text()
    example = (ROOT / "config" / "barsmith.example.toml").read_text()
    assert f"port = {DEFAULT_METRICS_PORT}" in example


def test_the_default_metrics_port_is_no_common_exporters_default() -> None:
    """Prometheus' list of default exporter ports (its wiki, from memory) fills 9100-9999;
    9464 is the OpenTelemetry Prometheus exporter's, 8000 and 2112 those of client-library
    examples, 9090-9094 Prometheus, Pushgateway, Alertmanager and Kafka, 19092 our broker."""
    assert not 9_000 <= DEFAULT_METRICS_PORT <= 9_999
    assert DEFAULT_METRICS_PORT not in {2112, 3000, 4317, 4318, 8000, 8080, 10250, 19092}
    assert DEFAULT_METRICS_PORT < 32_768  # below Linux's ephemeral ports, so never taken by chance


def test_dockerfile_copies_what_exists() -> None:
    for line in (DEPLOY / "Dockerfile").read_text().splitlines():
        if line.startswith("COPY") and "--from" not in line:
            for source in line.split()[1:-1]:
                assert (ROOT / source).exists(), source


def exposed_series() -> set[str]:
    """Every series name the service's registry can expose, samples or not yet (a
    per-partition gauge has none until partitions are assigned)."""
    metrics = ServiceMetrics(PartitionView(EngineStats, dict, dict))
    suffixes = {"counter": ["_total"], "histogram": ["_bucket", "_sum", "_count"], "gauge": [""]}
    return {
        family.name + suffix
        for family in text_string_to_metric_families(generate_latest(metrics.registry).decode())
        for suffix in suffixes.get(family.type, [""])
    }


def test_dashboard_queries_only_exposed_metrics() -> None:
    exposed = exposed_series()
    assert {"barsmith_consumer_lag_records", "barsmith_key_mismatches_total", "barsmith_bars_closed_total"} <= exposed
    dashboard = json.loads((DEPLOY / "grafana" / "dashboards" / "barsmith.json").read_text())
    used = {
        name
        for panel in dashboard["panels"]
        for t in panel["targets"]
        for name in re.findall(r"barsmith_\w+", t["expr"])
    }
    assert used and used <= exposed, used - exposed
