"""The node's status page (/) and audit (/audit) over HTTP, without a browser: basic
authentication (RFC 7617) when configured, loopback by default, no patient identity unless
configured, the figures the journal holds.  Invented studies of the fictional Harbour Vale
Cardiac Centre, graded by the real pipeline in an in-process node on loopback."""

from __future__ import annotations

import base64
import logging
import re
import urllib.error
import urllib.request

import pytest
from netutil import LOOPBACK, free_port, merged, wait_for

from service.commands.check_config import effective_toml
from service.config import MASK, HttpConfig, config_from_dict
from service.demo.scenario import CASES, case_datasets
from service.errors import UserError
from service.network.demo_loop import ResultReceiver, send_datasets
from service.network.service import Node
from service.pipeline import grade_study

pytestmark = pytest.mark.network

PASSWORD = "s3cret-Harbour-Vale"
NORMAL = next(c for c in CASES if c.key == "normal")
GRADE_2 = next(c for c in CASES if c.key == "grade-2")


@pytest.fixture
def start_node(loopback_nodes):
    def start(extra: dict | None = None, *, forward=()) -> Node:
        data = {
            "http": {"port": 0},
            "delivery": {
                "max_attempts": 1,
                "backoff_initial_seconds": 0.1,
                "backoff_max_seconds": 0.4,
            },
            "limits": {"shutdown_grace_seconds": 1},
        }
        return loopback_nodes.start(
            merged(data, extra), grade_fn=grade_study, settle=0.0, forward=forward
        )

    return start


def get(node: Node, path: str, auth: tuple[str, str] | None = None):
    request = urllib.request.Request(f"http://{LOOPBACK}:{node.http_port}{path}")
    if auth is not None:
        token = base64.b64encode(f"{auth[0]}:{auth[1]}".encode()).decode()
        request.add_header("Authorization", f"Basic {token}")
    try:
        with urllib.request.urlopen(request, timeout=30) as r:
            return r.status, dict(r.headers), r.read().decode()
    except urllib.error.HTTPError as exc:
        return exc.code, dict(exc.headers), exc.read().decode()


def figure(html: str, name: str) -> str:
    m = re.search(rf'data-figure="{name}"[^>]*>(?:<[^>]+>)*([^<]+)', html)
    assert m, f"no figure {name}"
    return m.group(1).strip()


def test_every_page_but_healthz_asks_for_the_configured_credentials(start_node, caplog):
    caplog.set_level(logging.DEBUG)
    node = start_node({"http": {"username": "echolab", "password": PASSWORD}})
    for path in ("/", "/audit", "/metrics"):
        code, headers, _ = get(node, path)
        assert code == 401
        assert headers["WWW-Authenticate"].startswith('Basic realm="diastolic-sr"')
        assert get(node, path, ("echolab", "wrong"))[0] == 401
        assert get(node, path, ("other", PASSWORD))[0] == 401
        assert get(node, path, ("echolab", PASSWORD))[0] == 200
    assert get(node, "/healthz")[0] == 200  # health probes need no credentials
    # the password is shown nowhere: not in the logs, not in the configuration shown
    code, _, html = get(node, "/", ("echolab", PASSWORD))
    assert PASSWORD not in html and MASK in html
    assert PASSWORD not in effective_toml(node.config)
    assert PASSWORD not in caplog.text
    assert PASSWORD not in repr(node.config)


def test_half_credentials_and_bad_user_names_are_refused():
    with pytest.raises(UserError, match=r"http\.username and http\.password: give both"):
        config_from_dict({"http": {"username": "echolab"}})
    with pytest.raises(UserError, match=r"http\.username and http\.password: give both"):
        config_from_dict({"http": {"password": PASSWORD}})
    with pytest.raises(UserError, match=r"http\.username: .*no colon"):
        config_from_dict({"http": {"username": "echo:lab", "password": PASSWORD}})


def test_pages_bound_to_loopback_by_default(start_node):
    assert HttpConfig().bind == "127.0.0.1"
    node = start_node()
    assert node.http is not None
    assert node.http._server.server_address[0] == "127.0.0.1"


def test_status_page_shows_the_journal_s_figures_and_no_patient(start_node):
    pacs = ResultReceiver("HV_PACS")
    pacs.start()
    try:
        node = start_node(forward=[f"HV_PACS@{LOOPBACK}:{pacs.port}"])
        datasets = case_datasets(NORMAL) + case_datasets(GRADE_2)
        assert send_datasets(datasets, node.port, called_ae="DIASTOLIC_SR") == [0, 0]
        wait_for(lambda: len(pacs.uids()) == 2, 60)
        journal = node.journal

        def settled() -> bool:
            depth = journal.queue_depth()
            return depth == {"studies_waiting": 0, "deliveries_pending": 0, "deliveries_failed": 0}

        wait_for(settled, 60)
        code, headers, html = get(node, "/")
    finally:
        pacs.stop()
    assert code == 200
    assert headers["Content-Type"] == "text/html; charset=utf-8"
    assert "script-src" not in headers["Content-Security-Policy"]  # default-src 'none'
    assert "default-src 'none'" in headers["Content-Security-Policy"]
    assert "Listening" in figure(html, "listener")
    assert figure(html, "objects-received") == "2"
    assert figure(html, "studies-graded") == "2"
    assert figure(html, "deliveries-failed") == "0"
    assert "No failed delivery" in html
    for name in ("Marlowe", "Quillfeather", "HV100201", "HV100203"):
        assert name not in html
    code, _, audit = get(node, "/audit")
    assert code == 200 and figure(audit, "studies") == "2"


@pytest.mark.parametrize("identities", [False, True])
def test_failed_delivery_names_the_patient_only_when_configured(start_node, identities):
    closed = free_port()  # nothing listens there: the delivery fails at once
    node = start_node(
        {"audit": {"include_patient_identifiers": identities}},
        forward=[f"HV_PACS@{LOOPBACK}:{closed}"],
    )
    assert send_datasets(case_datasets(NORMAL), node.port, called_ae="DIASTOLIC_SR") == [0]
    wait_for(lambda: node.journal.queue_depth()["deliveries_failed"] == 1, 60)
    code, _, html = get(node, "/")
    assert code == 200
    assert figure(html, "deliveries-failed") == "1"
    assert "Delivery of the result SR" in html and "--requeue-failed" in html
    assert ("Marlowe, Tessa" in html) is identities
    assert ("HV100201" in html) is identities
    if identities:  # recorded, then the configuration withdraws it: not shown any more
        data = node.config.model_dump(mode="json")
        data["audit"]["include_patient_identifiers"] = False
        node.reload(node.config.model_validate({**data, "base_dir": node.config.base_dir}))
        html = get(node, "/")[2]
        assert "Marlowe" not in html and "HV100201" not in html


def test_audit_page_period_and_errors(start_node):
    node = start_node()
    assert get(node, "/audit?days=7")[0] == 200
    code, _, html = get(node, "/audit?all=1")
    assert code == 200 and "All studies in the journal" in html
    code, _, html = get(node, "/audit?days=often")
    assert code == 400 and "whole number of days" in html
    code, _, text = get(node, "/nothing-here")
    assert code == 404 and "/audit" in text and "/healthz" in text


def test_status_page_can_be_switched_off(start_node):
    node = start_node({"http": {"status_page": False}})
    assert get(node, "/")[0] == 404
    assert get(node, "/healthz")[0] == 200


def test_a_delivery_being_retried_shows_with_its_reason_and_next_attempt(start_node):
    # the PACS is away: the first attempt fails and the next is minutes off; the page says why
    # and when, before the delivery has used up its attempts (PACS administrator's view)
    closed = free_port()  # nothing listens there: the attempt fails at once
    node = start_node(
        {
            "delivery": {
                "max_attempts": 5,
                "backoff_initial_seconds": 300,
                "backoff_max_seconds": 600,
            }
        },
        forward=[f"HV_PACS@{LOOPBACK}:{closed}"],
    )
    assert send_datasets(case_datasets(NORMAL), node.port, called_ae="DIASTOLIC_SR") == [0]

    def retrying():
        rows = node.journal.deliveries(states=["pending"])
        return rows if rows and rows[0]["attempts"] >= 1 else None

    [row] = wait_for(retrying, 60)
    assert row["last_error"]
    code, _, html = get(node, "/")
    assert code == 200
    assert figure(html, "deliveries-failed") == "0"
    assert figure(html, "deliveries-pending") == "1"
    assert 'data-retrying="1"' in html and "being retried; next attempt" in html
    assert "Connection refused" in html or "cannot connect" in html
    assert f"HV_PACS@{LOOPBACK}:{closed}" in html
