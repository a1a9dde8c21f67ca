"""The health and metrics endpoint of an in-process node on loopback: Prometheus metrics change
as studies flow (objects received, studies graded by outcome, deliveries by outcome, queue
depth, processing latency), /healthz reports its three checks.  The exposition format is
parsed with prometheus-client's own parser."""

from __future__ import annotations

import json
import urllib.error
import urllib.request

import pytest
from netutil import LOOPBACK, fake_grade, merged, send, simple_sr, wait_for
from prometheus_client.parser import text_string_to_metric_families
from pydicom.uid import generate_uid
from pynetdicom import AE

from service.network.demo_loop import ResultReceiver
from service.network.service import Node

pytestmark = pytest.mark.network


@pytest.fixture
def start_node(loopback_nodes):
    def start(extra: dict | None = None, *, settle: float = 0.0, forward=()) -> Node:
        data = {
            "http": {"port": 0},
            "delivery": {"backoff_initial_seconds": 0.1, "backoff_max_seconds": 0.4},
            "limits": {"shutdown_grace_seconds": 1},
        }
        return loopback_nodes.start(
            merged(data, extra), grade_fn=fake_grade, settle=settle, forward=forward
        )

    return start


def _get(node: Node, path: str) -> tuple[int, bytes]:
    url = f"http://{LOOPBACK}:{node.http_port}{path}"
    try:
        with urllib.request.urlopen(url, timeout=10) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read()


def metrics(node: Node) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    status, body = _get(node, "/metrics")
    assert status == 200
    out = {}
    for family in text_string_to_metric_families(body.decode()):
        for s in family.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def value(node_metrics, name: str, **labels: str) -> float:
    return node_metrics.get((name, tuple(sorted(labels.items()))), 0.0)


def test_metrics_change_as_studies_flow(start_node):
    pacs = ResultReceiver("HV_PACS")
    pacs.start()
    try:
        node = start_node(forward=[f"HV_PACS@{LOOPBACK}:{pacs.port}"])
        before = metrics(node)
        assert value(before, "diastolic_sr_objects_received_total", outcome="stored") == 0
        assert value(before, "diastolic_sr_processing_seconds_count") == 0

        good = [simple_sr(), simple_sr()]
        refused = simple_sr()
        refused.PatientComments = "REJECT"  # fake_grade: not gradable
        no_study = simple_sr()
        del no_study.StudyInstanceUID  # answered 0xA900 (PS3.4 Annex B.2.3)
        assert send([*good, refused, no_study], node.port) == [0, 0, 0, 0xA900]
        studies = [str(d.StudyInstanceUID) for d in [*good, refused]]
        wait_for(
            lambda: all(
                (node.journal.study(s) or {}).get("state") in ("delivered", "failed")
                for s in studies
            ),
            30,
        )
        ae = AE(ae_title="SCANNER1")
        ae.acse_timeout = 5
        ae.add_requested_context("1.2.840.10008.1.1")
        assert ae.associate(LOOPBACK, node.port, ae_title="NOT_US").is_rejected

        after = metrics(node)
        assert value(after, "diastolic_sr_objects_received_total", outcome="stored") == 3
        assert value(after, "diastolic_sr_objects_received_total", outcome="rejected") == 1
        assert value(after, "diastolic_sr_studies_graded_total", outcome="graded") == 2
        assert value(after, "diastolic_sr_studies_graded_total", outcome="rejected") == 1
        # two results to the PACS and two into the results folder
        assert (
            value(after, "diastolic_sr_deliveries_total", outcome="delivered", kind="result") == 2
        )
        assert value(after, "diastolic_sr_deliveries_total", outcome="delivered", kind="file") == 2
        assert value(after, "diastolic_sr_processing_seconds_count") == 3
        assert value(after, "diastolic_sr_associations_total", outcome="accepted") >= 1
        assert value(after, "diastolic_sr_associations_total", outcome="rejected") == 1
        assert value(after, "diastolic_sr_queue_depth", queue="studies_waiting") == 0
        assert value(after, "diastolic_sr_queue_depth", queue="deliveries_pending") == 0
    finally:
        pacs.stop()


def test_queue_depth_and_failed_deliveries(start_node):
    node = start_node(settle=3600)  # nothing is graded while the test runs
    study = generate_uid()
    assert send([simple_sr(study)], node.port) == [0]
    m = metrics(node)
    assert value(m, "diastolic_sr_queue_depth", queue="studies_waiting") == 1

    down = start_node(
        {"delivery": {"max_attempts": 2, "results_folder": ""}},
        forward=[f"GONE@{LOOPBACK}:9"],  # discard port on loopback: nothing listens
    )
    ds = simple_sr()
    assert send([ds], down.port) == [0]
    wait_for(lambda: (down.journal.study(str(ds.StudyInstanceUID)) or {}).get("state") == "failed")
    m = metrics(down)
    assert value(m, "diastolic_sr_deliveries_total", outcome="retry", kind="result") == 1
    assert value(m, "diastolic_sr_deliveries_total", outcome="failed", kind="result") == 1
    assert value(m, "diastolic_sr_queue_depth", queue="deliveries_failed") == 1
    # nodes in one process keep their own registries
    assert (
        value(metrics(node), "diastolic_sr_deliveries_total", outcome="failed", kind="result") == 0
    )


def test_healthz_reports_listener_journal_and_disk(start_node):
    node = start_node()
    status, body = _get(node, "/healthz")
    report = json.loads(body)
    assert status == 200 and report["status"] == "ok"
    assert report["checks"]["listener"]["ok"] and report["checks"]["listener"]["port"] == node.port
    assert report["checks"]["journal"] == {"ok": True}
    assert report["checks"]["disk"]["ok"] and report["checks"]["disk"]["free_mb"] > 0
    assert _get(node, "/nothing")[0] == 404

    node.listener.stop_accepting()  # the listening socket closes
    status, body = _get(node, "/healthz")
    assert status == 503
    assert json.loads(body)["checks"]["listener"]["ok"] is False


def test_healthz_fails_when_disk_space_is_short(start_node):
    node = start_node({"http": {"min_free_disk_mb": 10**12}})  # more than any disk has
    status, body = _get(node, "/healthz")
    report = json.loads(body)
    assert status == 503 and report["status"] == "fail"
    assert report["checks"]["disk"]["ok"] is False
    assert report["checks"]["listener"]["ok"] and report["checks"]["journal"]["ok"]


def test_healthz_fails_when_the_journal_cannot_take_a_write(start_node):
    node = start_node()
    node.journal.close()  # as when the database is gone
    try:
        status, body = _get(node, "/healthz")
        assert status == 503
        assert json.loads(body)["checks"]["journal"]["ok"] is False
    finally:
        from service.store.sqlite_journal import SqliteJournal

        node.journal = SqliteJournal(node.journal.path)  # let the fixture stop the node cleanly


def test_studies_are_counted_by_outcome_and_af_is_not_not_gradable(loopback_nodes):
    # The outcome vocabulary (service.model.Outcome, docs/vocabulary.md): a study in atrial
    # fibrillation is "atrial-fibrillation" in the metrics, the log and `queue`, never counted
    # with the studies that could not be graded for missing data.  The real grading pipeline.
    from service.commands.queue import build_report
    from service.demo.scenario import CASES, case_datasets

    cases = {c.key: c for c in CASES}
    af = case_datasets(cases["atrial-fibrillation"])
    missing = case_datasets(cases["not-gradable"])
    data = {"http": {"port": 0}, "limits": {"shutdown_grace_seconds": 1}}
    node = loopback_nodes.start(data)
    assert send([*af, *missing], node.port) == [0, 0]
    studies = [str(af[0].StudyInstanceUID), str(missing[0].StudyInstanceUID)]
    wait_for(
        lambda: all(
            (node.journal.study(s) or {}).get("state") in ("graded", "delivered", "failed")
            for s in studies
        ),
        60,
    )
    m = metrics(node)
    graded = "diastolic_sr_studies_graded_total"
    assert value(m, graded, outcome="atrial-fibrillation") == 1
    assert value(m, graded, outcome="not-gradable") == 1
    assert value(m, graded, outcome="graded") == 0
    recent = {r["study_uid"]: r for r in build_report(node.journal, recent=10)["recent"]}
    assert recent[studies[0]]["outcome"] == "atrial-fibrillation"
    assert recent[studies[0]]["grade"] == "not-applicable"
    assert recent[studies[1]]["outcome"] == "not-gradable"
