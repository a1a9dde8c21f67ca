"""The audit and the status page in a real browser (headless Chromium from Debian, driven by
Playwright): the figures shown are the journal's, the page makes no request beyond loopback,
logs no console error, needs no JavaScript and fits a small screen.  Studies are invented
(fictional Harbour Vale Cardiac Centre) and graded by the real pipeline in a node on loopback;
the PACS is DCMTK's storescp (Debian dcmtk) or the demo's pynetdicom storage SCP."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
from browser import assert_clean, chromium, fits_the_width, need_chromium, screenshot
from netutil import (
    DCMTK_REASON,
    LOOPBACK,
    SKIP_WITHOUT_DCMTK,
    free_port,
    journal_args,
    storescp,
    wait_for,
)

from service.demo.scenario import CASES, case_datasets
from service.model import Measure
from service.network.demo_loop import ResultReceiver, send_datasets
from service.pipeline import grade_study
from service.sr.echo_builder import EchoItem, Equipment, Patient, Study, build_echo_sr

pytestmark = pytest.mark.network

NODE_AE = "DIASTOLIC_SR"
WITH_TR = "HV_ECHO_A"
WITHOUT_TR = "HV_ECHO_B"


@pytest.fixture(autouse=True)
def _chromium():
    need_chromium()


def _start(loopback_nodes, forward: str, extra: dict | None = None, settle: float = 0.0):
    data = {
        "http": {"port": 0},
        "delivery": {"max_attempts": 2, "backoff_initial_seconds": 0.1, "backoff_max_seconds": 0.2},
        "limits": {"shutdown_grace_seconds": 1},
        **(extra or {}),
    }
    return loopback_nodes.start(data, grade_fn=grade_study, settle=settle, forward=[forward])


def _study(n: int, *, tr: bool, station: str):
    """An invented study with (or without) a TR velocity."""
    values = {
        Measure.lvef: 60,
        Measure.mitral_e: 80,
        Measure.mitral_a: 62,
        Measure.e_prime_septal: 8.5 + n / 10,
        Measure.e_prime_lateral: 11.5,
        Measure.lavi: 30,
    }
    if tr:
        values[Measure.tr_peak_velocity] = 2.4
    return build_echo_sr(
        [EchoItem(measure=m, value=v) for m, v in values.items()],
        patient=Patient(name=f"Browser^Case{n}", id=f"HVB{n:04d}"),
        study=Study(seed=f"browser-test-{station}-{n}", accession=f"HVB{n:04d}"),
        equipment=Equipment(station_name=station, model=f"HV-Echo {station[-1]}"),
    )


def _cell(page, device: str, measure: str) -> str:
    locator = page.locator(
        f'table[data-table="devices"] td[data-device="{device}"][data-measure="{measure}"]'
    )
    return locator.inner_text().strip()


def test_two_devices_one_never_sends_tr_velocity(loopback_nodes, tmp_path):
    pacs = ResultReceiver("HV_PACS")
    pacs.start()
    try:
        node = _start(loopback_nodes, f"HV_PACS@{LOOPBACK}:{pacs.port}")
        a = [_study(n, tr=True, station="ECHO-A") for n in range(3)]
        b = [_study(n, tr=False, station="ECHO-B") for n in range(3, 5)]
        assert send_datasets(a, node.port, called_ae=NODE_AE, calling_ae=WITH_TR) == [0] * 3
        assert send_datasets(b, node.port, called_ae=NODE_AE, calling_ae=WITHOUT_TR) == [0] * 2
        wait_for(lambda: len(pacs.uids()) == 5, 90)
        wait_for(lambda: sum(r.delivered_at is not None for r in node.journal.audit_rows()) == 5)
        rows = node.journal.audit_rows()
        # the audit from the command line: JSON and the HTML page
        page_file = tmp_path / "audit.html"
        run = subprocess.run(
            [sys.executable, "-m", "service.cli", "audit", *journal_args(node),
             "--json", "--html", str(page_file)],
            capture_output=True, text=True, timeout=120,
        )  # fmt: skip
        assert run.returncode == 0, run.stderr
        data = json.loads(run.stdout)
        assert data["studies"] == len(rows) == 5
        assert data["devices"][WITH_TR]["studies"] == 3
        assert data["devices"][WITHOUT_TR]["studies"] == 2
        assert data["devices"][WITH_TR]["measures"]["tr_peak_velocity"] == 1.0
        assert data["devices"][WITHOUT_TR]["measures"]["tr_peak_velocity"] == 0.0
        assert data["measures"]["tr_peak_velocity"] == 3 / 5
        with chromium() as (page, log):
            page.goto(page_file.as_uri(), wait_until="load")
            assert _cell(page, WITH_TR, "tr_peak_velocity") == "100 %"
            assert _cell(page, WITHOUT_TR, "tr_peak_velocity") == "0 %"
            assert _cell(page, WITHOUT_TR, "lavi") == "100 %"
            studies = page.locator('[data-figure="studies"]').inner_text()
            assert studies == "5"
            assert page.locator('td[data-device-studies="HV_ECHO_B"]').inner_text() == "2"
            station = page.locator('table[data-table="device-list"] tr[data-device="HV_ECHO_B"]')
            assert "ECHO-B" in station.inner_text()
            assert page.locator("svg").count() == 10
            screenshot(page, tmp_path / "audit-file.png")
            assert_clean(log)
            # the same report served by the node, over the last 30 days
            page.goto(f"http://{LOOPBACK}:{node.http_port}/audit", wait_until="load")
            assert _cell(page, WITH_TR, "tr_peak_velocity") == "100 %"
            assert _cell(page, WITHOUT_TR, "tr_peak_velocity") == "0 %"
            assert page.locator('[data-figure="studies"]').inner_text() == "5"
            outcome_cells = page.locator('table[data-table="outcomes"] tr[data-outcome] td.num')
            shown = {}
            for tr in page.locator('table[data-table="outcomes"] tr[data-outcome]').all():
                shown[tr.get_attribute("data-outcome")] = int(
                    tr.locator("td.num").first.inner_text()
                )
            assert outcome_cells.count() == 16
            expected = {o: sum(r.outcome == o for r in rows) for o in shown}
            assert shown == expected
            screenshot(page, tmp_path / "audit-node.png")
            assert_clean(log)
        assert "Browser^Case" not in page_file.read_text(encoding="utf-8")
    finally:
        pacs.stop()


@pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)
def test_status_page_shows_the_queue_and_a_failed_delivery_after_the_pacs_stopped(
    loopback_nodes, tmp_path
):
    port = free_port()
    cases = {c.key: c for c in CASES}
    with storescp(tmp_path / "pacs", port, ae_title="HV_PACS") as pacs:
        node = _start(loopback_nodes, f"HV_PACS@{LOOPBACK}:{port}", settle=1.0)
        journal = node.journal
        sent = send_datasets(case_datasets(cases["normal"]), node.port, called_ae=NODE_AE)
        assert sent == [0]
        wait_for(lambda: journal.queue_depth()["deliveries_pending"] == 0
                 and journal.queue_depth()["studies_waiting"] == 0
                 and len(journal.deliveries(states=["delivered"])) == 2, 60)  # fmt: skip
        pacs.terminate()
        pacs.wait(10)
    # the PACS is stopped: the next result cannot be delivered
    send_datasets(case_datasets(cases["grade-2"]), node.port, called_ae=NODE_AE)
    wait_for(lambda: journal.queue_depth()["deliveries_failed"] == 1, 60)
    with chromium() as (page, log):
        url = f"http://{LOOPBACK}:{node.http_port}/"
        # one more study, still in its settle window when the page is read: the queue
        send_datasets(case_datasets(cases["grade-3"]), node.port, called_ae=NODE_AE)

        def consistent_snapshot():
            before = journal.queue_depth()
            page.goto(url, wait_until="load")
            after = journal.queue_depth()
            return before if before == after and before["studies_waiting"] == 1 else None

        depth = wait_for(consistent_snapshot, 30, interval=0.0)
        tile = page.locator('[data-figure="studies-waiting"]').inner_text().strip()
        assert tile == str(depth["studies_waiting"]) == "1"
        assert page.locator('[data-figure="deliveries-failed"]').inner_text().strip().endswith("1")
        assert "Listening" in page.locator('[data-figure="listener"]').inner_text()
        failure = page.locator('table[data-table="failures"] tbody tr')
        assert failure.count() == 1
        text = failure.inner_text()
        assert "Delivery of the result SR" in text and "HV_PACS" in text
        assert "cannot connect" in text or "association" in text
        (failed,) = journal.deliveries(states=["failed"])
        assert failed["study_uid"] in text
        hint = page.locator("#requeue-hint").inner_text()
        assert "diastolic-sr queue --data-dir" in hint and "--requeue-failed" in hint
        objects = len(journal.objects())
        assert page.locator('[data-figure="objects-received"]').inner_text() == str(objects)
        # the configuration in force, readable without JavaScript (<details>)
        assert "[delivery]" in (page.locator("pre.config").text_content() or "")
        body = page.locator("body").inner_text()
        for name in ("Marlowe", "Quillfeather", "Okonkwo", "HV100201"):
            assert name not in body
        screenshot(page, tmp_path / "status.png")
        assert_clean(log)


def test_pages_need_no_javascript_and_fit_a_small_screen(loopback_nodes, tmp_path):
    pacs = ResultReceiver("HV_PACS")
    pacs.start()
    try:
        node = _start(loopback_nodes, f"HV_PACS@{LOOPBACK}:{pacs.port}", settle=0.5)
        send_datasets([ds for c in CASES for ds in case_datasets(c)], node.port, called_ae=NODE_AE)

        def all_delivered() -> bool:
            rows = node.journal.audit_rows()
            return len(rows) == len(CASES) and all(r.delivered_at for r in rows)

        wait_for(all_delivered, 90)
        base = f"http://{LOOPBACK}:{node.http_port}"
        with chromium(javascript=False, width=375) as (page, log):
            for path, name, heading in (
                ("/", "status-small.png", "Node DIASTOLIC_SR"),
                ("/audit", "audit-small.png", "Diastolic function audit"),
            ):
                page.goto(base + path, wait_until="load")
                assert page.locator("h1").inner_text() == heading
                assert fits_the_width(page), f"{path} is wider than a 375 px screen"
                screenshot(page, tmp_path / name)
            assert page.locator('[data-figure="studies"]').inner_text() == str(len(CASES))
            assert_clean(log)
    finally:
        pacs.stop()


def test_after_the_demo_the_audit_shows_every_figure_for_the_demo_studies(tmp_path):
    """``diastolic-sr demo`` (the node with its grading processes), then ``audit --html`` and
    ``--json`` on its data directory: the outcomes are those the offline pipeline gives the
    same demo studies, and the page shows every figure, in Chromium."""
    from service.demo.scenario import SITE_MAPPING
    from service.pipeline import GradeOptions
    from service.vocabulary.mapper import load_mapping_table

    work = tmp_path / "demo"
    demo = subprocess.run(
        [sys.executable, "-m", "service.cli", "demo", "--workdir", str(work)],
        capture_output=True, text=True, timeout=300,
    )  # fmt: skip
    assert demo.returncode == 0, demo.stdout + demo.stderr
    page_file = tmp_path / "audit.html"
    run = subprocess.run(
        [sys.executable, "-m", "service.cli", "audit", "--data-dir", str(work / "node"),
         "--html", str(page_file), "--json"],
        capture_output=True, text=True, timeout=120,
    )  # fmt: skip
    assert run.returncode == 0, run.stderr
    data = json.loads(run.stdout)
    table = load_mapping_table([SITE_MAPPING])
    expected: dict[str, int] = {}
    for case in CASES:
        outcome = grade_study(case_datasets(case), GradeOptions(), table=table)
        token = outcome.assessment.outcome.value
        expected[token] = expected.get(token, 0) + 1
    assert data["studies"] == len(CASES)
    assert {k: v for k, v in data["outcomes"].items() if v} == expected
    assert data["borderline"]["studies"]["count"] >= 1  # the demo's borderline case
    assert data["undecided"] == expected.get("indeterminate", 0) + expected.get("not-gradable", 0)
    assert data["processing"]["delivered"] == len(CASES)
    assert data["processing"]["latency_p50_seconds"] > 0
    with chromium() as (page, log):
        page.goto(page_file.as_uri(), wait_until="load")
        assert page.locator('[data-figure="studies"]').inner_text() == str(len(CASES))
        for section in (
            "outcomes",
            "by-pathway",
            "by-month",
            "indeterminate",
            "measures",
            "devices",
            "missing",
            "borderline",
            "disagreement",
            "processing",
        ):
            heading = page.locator(f"section#{section} h2")
            assert heading.count() == 1 and heading.is_visible()
            assert page.locator(f"section#{section} svg").count() == 1
        rows = page.locator('table[data-table="outcomes"] tr[data-outcome]').all()
        shown = {r.get_attribute("data-outcome"): int(r.locator("td.num").first.inner_text())
                 for r in rows}  # fmt: skip
        assert {k: v for k, v in shown.items() if v} == expected
        screenshot(page, tmp_path / "audit-after-demo.png")
        assert_clean(log)
