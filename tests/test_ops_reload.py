"""SIGHUP reload on a node in a subprocess: a good new configuration is put in force for new
associations while an open association goes on; a bad one is refused with its reason and the
running configuration stays in force."""

from __future__ import annotations

import json
import signal

import pytest
from netutil import LOOPBACK, NODE_AE, NodeProcess, wait_for, write_config
from pynetdicom import AE

pytestmark = pytest.mark.network

VERIFICATION = "1.2.840.10008.1.1"  # PS3.4 Annex A


def _associate(port: int, calling: str):
    ae = AE(ae_title=calling)
    ae.acse_timeout = ae.dimse_timeout = ae.network_timeout = 10
    ae.add_requested_context(VERIFICATION)
    return ae.associate(LOOPBACK, port, ae_title=NODE_AE)


def _digest(node: NodeProcess) -> str:
    return json.loads((node.data_dir / "run" / "listener.json").read_text())["config_digest"]


def _config(allowed: list[str]) -> str:
    return f"[access]\nallowed_calling_aes = {json.dumps(allowed)}\n"


def test_sighup_reload_good_then_bad_file(tmp_path):
    cfg = write_config(tmp_path / "node.toml", _config(["HV_ECHO1"]))
    node = NodeProcess(tmp_path / "data", ["--config", str(cfg), "--port", "0"])
    try:
        port = node.start()
        first_digest = _digest(node)
        open_assoc = _associate(port, "HV_ECHO1")
        assert open_assoc.is_established
        assert not _associate(port, "HV_ECHO2").is_established  # not allowed yet

        # a good file: HV_ECHO2 allowed, HV_ECHO1 no longer
        write_config(cfg, _config(["HV_ECHO2"]))
        node.proc.send_signal(signal.SIGHUP)
        wait_for(lambda: _digest(node) != first_digest, 20)
        assert '"config_reloaded"' in node.log()
        assert open_assoc.is_established  # the open association was not dropped
        assert open_assoc.send_c_echo().Status == 0x0000
        second = _associate(port, "HV_ECHO2")
        assert second.is_established
        second.release()
        assert _associate(port, "HV_ECHO1").is_rejected  # new policy for new associations
        good_digest = _digest(node)

        # a bad file: refused, the previous configuration stays in force
        write_config(cfg, '[access]\nallowed_calling_aes = ["HV_ECHO3"]\n[routes]\nx = 1\n')
        node.proc.send_signal(signal.SIGHUP)
        wait_for(lambda: '"config_reload_refused"' in node.log(), 20)
        refused = [
            json.loads(line)
            for line in node.log().splitlines()
            if '"config_reload_refused"' in line
        ]
        assert "routes" in refused[0]["reason"]
        assert _digest(node) == good_digest
        third = _associate(port, "HV_ECHO2")
        assert third.is_established  # still the good configuration
        third.release()
        assert _associate(port, "HV_ECHO3").is_rejected
        assert open_assoc.send_c_echo().Status == 0x0000
        open_assoc.release()
        assert node.proc.poll() is None  # still running
        assert node.terminate() == 0
    finally:
        node.kill()


def test_reload_keeps_restart_only_keys_and_says_so(tmp_path):
    cfg = write_config(tmp_path / "node.toml", "[limits]\nmax_associations = 16\n")
    node = NodeProcess(tmp_path / "data", ["--config", str(cfg), "--port", "0"])
    try:
        port = node.start()
        write_config(cfg, "[limits]\nmax_associations = 20\n[assembly]\nsettle_seconds = 3\n")
        node.proc.send_signal(signal.SIGHUP)
        wait_for(lambda: '"config_reloaded"' in node.log(), 20)
        line = next(x for x in node.log().splitlines() if '"config_reloaded"' in x)
        assert json.loads(line)["restart_needed"] == ["limits"]
        assoc = _associate(port, "HV_ECHO1")
        assert assoc.is_established
        assoc.release()
        assert node.terminate() == 0
    finally:
        node.kill()
