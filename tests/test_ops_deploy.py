"""Deployment files stay consistent with the README and the code (docker cannot run here):
the Dockerfile installs exactly as the README says and checks /healthz on the configured
default port; compose and systemd command lines are ones the CLI accepts; the compose node
configuration passes check-config."""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path

from service.cli import build_parser
from service.cli import main as cli_main
from service.config import DEFAULT_HTTP_PORT, DEFAULT_PORT, default_config

REPO = Path(__file__).resolve().parents[1]
DOCKER = REPO / "docker"


def _readme_install() -> str:
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    m = re.search(r"```sh\n(python3 -m venv \.venv && \.venv/bin/pip install -q -e \.)", readme)
    assert m, "README install line not found"
    return m.group(1)


def test_dockerfile_installs_as_the_readme_says():
    dockerfile = (DOCKER / "Dockerfile").read_text()
    assert f"RUN {_readme_install()}" in dockerfile


def test_dockerfile_health_check_and_ports_match_the_defaults():
    dockerfile = (DOCKER / "Dockerfile").read_text()
    health = re.search(r"HEALTHCHECK [^\n]*\n\s*CMD (\[[^\n]*\])", dockerfile)
    assert health
    probe = " ".join(json.loads(health.group(1)))
    cfg = default_config()
    assert f"http://{cfg.http.bind}:{DEFAULT_HTTP_PORT}/healthz" in probe
    assert cfg.http.enabled and cfg.http.port == DEFAULT_HTTP_PORT
    assert f"EXPOSE {DEFAULT_PORT}" in dockerfile
    cmd = json.loads(re.search(r"^CMD (\[.*\])$", dockerfile, flags=re.M).group(1))
    args = build_parser().parse_args(cmd)
    assert args.command == "serve" and args.port == DEFAULT_PORT and args.data_dir == "/data"
    assert "USER diastolic" in dockerfile  # non-root


def test_compose_command_and_node_configuration(capsys):
    compose = (DOCKER / "compose.yaml").read_text()
    cmd = json.loads(re.search(r'command: (\["serve".*\])', compose).group(1))
    args = build_parser().parse_args(cmd)
    assert args.config == "/config/diastolic-sr.toml"
    assert "./compose-node.toml:/config/diastolic-sr.toml:ro" in compose
    assert "apt-get install -y -qq dcmtk" in compose  # the test PACS is Debian's DCMTK
    assert cli_main(["check-config", str(DOCKER / "compose-node.toml")]) == 0
    out = capsys.readouterr().out
    assert 'host = "pacs"' in out and "summary_pdf = true" in out
    pacs = re.search(r'command: (\["storescp".*\])', compose)
    assert pacs and '"TEST_PACS"' in pacs.group(1)
    assert 'ae_title = "TEST_PACS"' in out


def test_systemd_unit_command_lines_are_accepted_by_the_cli():
    unit = (DOCKER / "diastolic-sr.service").read_text()
    lines = dict(
        line.split("=", 1)
        for line in unit.splitlines()
        if line and line[0].isupper() and "=" in line
    )
    for key in ("ExecStartPre", "ExecStart"):
        argv = shlex.split(lines[key])
        assert argv[0].endswith("/.venv/bin/diastolic-sr")
        build_parser().parse_args(argv[1:])  # exits (SystemExit) on an unknown flag
    assert shlex.split(lines["ExecStart"])[1] == "serve"
    assert lines["ExecReload"] == "/bin/kill -HUP $MAINPID"  # SIGHUP reload
    assert lines["KillSignal"] == "SIGTERM"  # clean stop
    assert _readme_install() in unit


def test_cluster_compose_two_nodes_on_one_postgresql_behind_a_tcp_balancer(capsys):
    compose = (DOCKER / "compose-cluster.yaml").read_text()
    cmd = json.loads(re.search(r'command: (\["serve".*\])', compose).group(1))
    args = build_parser().parse_args(cmd)
    assert args.journal == "postgresql://diastolic@db:5432/diastolic"
    assert ":" not in args.journal.split("//", 1)[1].split("@", 1)[0]  # no password in it
    assert "PGPASSWORD: ${DSR_DB_PASSWORD" in compose
    assert "node-a:" in compose and "node-b:" in compose and "image: postgres:" in compose
    assert "./compose-node.toml:/config/diastolic-sr.toml:ro" in compose  # one configuration
    assert cli_main(["check-config", str(DOCKER / "compose-node.toml")]) == 0
    capsys.readouterr()
    balancer = (DOCKER / "haproxy.cfg").read_text()
    assert re.search(r"^\s*mode tcp$", balancer, flags=re.M)  # whole connections
    assert "server node-a node-a:11112" in balancer and "server node-b node-b:11112" in balancer
