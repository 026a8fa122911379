"""Dockerfile and docker-compose.yml: they cannot run here (no Docker engine), so check that
they parse, reference real files, and agree with the config on ports."""

from pathlib import Path

import yaml

from streamdet.config import load_config
from streamdet.daemon.settings import parse_settings

ROOT = Path(__file__).resolve().parents[1]


def test_compose_parses_and_references_real_files():
    compose = yaml.safe_load((ROOT / "docker-compose.yml").read_text())
    services = compose["services"]
    assert {"kafka", "streamdet", "prometheus", "demo-producer"} <= services.keys()
    assert services["kafka"]["image"].startswith("apache/kafka")
    assert services["kafka"]["environment"]["KAFKA_PROCESS_ROLES"] == "broker,controller"  # KRaft
    for name, svc in services.items():
        if "build" in svc:
            assert (ROOT / svc["build"] / "Dockerfile").is_file(), name
        for vol in svc.get("volumes", []):
            src = vol.split(":")[0]
            if src.startswith("."):
                assert (ROOT / src).exists(), f"{name}: {src}"


def test_ports_agree_with_config():
    compose = yaml.safe_load((ROOT / "docker-compose.yml").read_text())
    settings = parse_settings(load_config(ROOT / "config" / "docker.yaml"))
    _host, port = settings.health_host_port
    assert f"{port}:{port}" in compose["services"]["streamdet"]["ports"]
    assert settings.bootstrap_servers == "kafka:9092"
    prom = yaml.safe_load((ROOT / "config" / "prometheus.yml").read_text())
    assert prom["scrape_configs"][0]["static_configs"][0]["targets"] == [f"streamdet:{port}"]
    assert f"EXPOSE {port}" in (ROOT / "Dockerfile").read_text()


def test_dockerfile_runs_as_non_root_and_copies_real_paths():
    text = (ROOT / "Dockerfile").read_text()
    assert "\nUSER streamdet" in text
    for line in text.splitlines():
        if line.startswith("COPY "):
            for src in line.split()[1:-1]:
                assert (ROOT / src).exists(), src
