"""DICOM over TLS on loopback with a throw-away PKI made by the ``openssl`` command line:
the listener accepts TLS associations and refuses plain TCP when TLS is required, demands a
client certificate when configured, and results go to a destination over TLS.  TLS profile:
DICOM PS3.15 Annex B (TLS secure transport connection profiles); Python ``ssl``."""

from __future__ import annotations

import ssl

import pytest
from netutil import LOOPBACK, NODE_AE, fake_grade, send, simple_sr, wait_for
from pynetdicom import AE
from tlsutil import OPENSSL, make_pki

from service.network.demo_loop import ResultReceiver
from service.network.service import Node

pytestmark = [
    pytest.mark.network,
    pytest.mark.skipif(OPENSSL is None, reason="openssl command line missing"),
]

VERIFICATION = "1.2.840.10008.1.1"  # PS3.4 Annex A


@pytest.fixture(scope="module")
def pki(tmp_path_factory):
    return make_pki(tmp_path_factory.mktemp("pki"))


@pytest.fixture
def tls_node(loopback_nodes):
    def start(tls: dict, extra: dict | None = None) -> Node:
        data = {
            "tls": tls,
            "http": {"enabled": False},
            "delivery": {"backoff_initial_seconds": 0.1, "backoff_max_seconds": 0.4},
            "limits": {"shutdown_grace_seconds": 1, "acse_timeout": 5, "network_timeout": 5},
            **(extra or {}),
        }
        return loopback_nodes.start(data, grade_fn=fake_grade)

    return start


def _client_context(pki, *, with_cert: bool) -> ssl.SSLContext:
    ctx = ssl.create_default_context(ssl.Purpose.SERVER_AUTH, cafile=str(pki.ca_cert))
    if with_cert:
        ctx.load_cert_chain(pki.client_cert, pki.client_key)
    return ctx


def _echo(port: int, tls_args=None) -> int | None:
    ae = AE(ae_title="HV_ECHO1")
    ae.acse_timeout = ae.dimse_timeout = ae.network_timeout = 5
    ae.add_requested_context(VERIFICATION)
    assoc = ae.associate(LOOPBACK, port, ae_title=NODE_AE, tls_args=tls_args)
    if not assoc.is_established:
        return None
    try:
        return int(assoc.send_c_echo().Status)
    finally:
        assoc.release()


def _server_tls(pki, **more) -> dict:
    return {
        "enabled": True,
        "certificate": str(pki.server_cert),
        "private_key": str(pki.server_key),
        **more,
    }


def test_tls_association_works_and_plain_tcp_is_refused(tls_node, pki):
    node = tls_node(_server_tls(pki))
    ctx = _client_context(pki, with_cert=False)
    assert _echo(node.port, (ctx, LOOPBACK)) == 0x0000  # PS3.7 C-ECHO success
    assert _echo(node.port) is None  # plain TCP client: no association
    assert _echo(node.port, (ctx, LOOPBACK)) == 0x0000  # and the listener is still fine


def test_client_certificate_required(tls_node, pki):
    node = tls_node(_server_tls(pki, require_client_certificate=True, ca_bundle=str(pki.ca_cert)))
    assert _echo(node.port, (_client_context(pki, with_cert=False), LOOPBACK)) is None
    assert _echo(node.port, (_client_context(pki, with_cert=True), LOOPBACK)) == 0x0000


def test_results_go_to_a_destination_over_tls(tls_node, pki):
    server_ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    server_ctx.load_cert_chain(pki.server_cert, pki.server_key)
    pacs = ResultReceiver("HV_PACS", ssl_context=server_ctx)
    pacs.start()
    try:
        node = tls_node(
            {"ca_bundle": str(pki.ca_cert)},
            {
                "destinations": {
                    "PACS_MAIN": {
                        "ae_title": "HV_PACS",
                        "host": LOOPBACK,
                        "port": pacs.port,
                        "tls": True,
                    }
                }
            },
        )
        ds = simple_sr()
        assert send([ds], node.port) == [0]
        study = str(ds.StudyInstanceUID)
        wait_for(lambda: (node.journal.study(study) or {}).get("state") == "delivered", 30)
        assert len(pacs.uids()) == 1
        d = node.journal.deliveries(states=["delivered"])
        assert any(x["destination"] == "PACS_MAIN" for x in d)
    finally:
        pacs.stop()


def test_destination_over_tls_with_an_untrusted_certificate_fails_with_a_reason(
    tls_node, pki, tmp_path
):
    other = make_pki(tmp_path / "other")  # a CA the node does not trust
    server_ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    server_ctx.load_cert_chain(other.server_cert, other.server_key)
    pacs = ResultReceiver("HV_PACS", ssl_context=server_ctx)
    pacs.start()
    try:
        node = tls_node(
            {"ca_bundle": str(pki.ca_cert)},
            {
                "destinations": {
                    "PACS_MAIN": {
                        "ae_title": "HV_PACS",
                        "host": LOOPBACK,
                        "port": pacs.port,
                        "tls": True,
                    }
                },
                "delivery": {
                    "max_attempts": 1,
                    "backoff_initial_seconds": 0.1,
                    "results_folder": "",
                },
            },
        )
        ds = simple_sr()
        assert send([ds], node.port) == [0]
        study = str(ds.StudyInstanceUID)
        wait_for(lambda: (node.journal.study(study) or {}).get("state") == "failed", 30)
        assert pacs.uids() == []
        reason = node.journal.study(study)["reason"]
        assert "PACS_MAIN" in reason and "(TLS)" in reason
    finally:
        pacs.stop()
