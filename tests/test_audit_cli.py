"""``diastolic-sr audit`` on a journal filled with the invented demo history (fictional Harbour
Vale Cardiac Centre; the real grading pipeline, invented times): one self-contained HTML page,
the JSON figures, a PDF, the period options and clear errors."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from datetime import datetime

import pytest

from service.cli import main
from service.demo.history import fill_history
from service.store.journal import open_journal

NOW = datetime(2026, 11, 30, 18, 0).timestamp()


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("audit") / "node"
    assert fill_history(d, 60, days=60, now=NOW) == 60
    return d


def _run(capsys, *args: str) -> tuple[int, str, str]:
    code = main(["audit", *args])
    out, err = capsys.readouterr()
    return code, out, err


def test_html_is_one_self_contained_page(data_dir, tmp_path, capsys):
    page = tmp_path / "audit.html"
    code, out, _ = _run(capsys, "--data-dir", str(data_dir), "--html", str(page))
    assert code == 0 and f"written: {page}" in out
    html = page.read_text(encoding="utf-8")
    assert html.startswith("<!DOCTYPE html>")
    # nothing fetched from anywhere: no script, stylesheet link, external source or import
    assert "<script" not in html and "<link" not in html and "@import" not in html
    # (links only to the page's own anchors and definitions, images only inline as data)
    assert not re.search(r"""(?:src|href)\s*=\s*["'](?!#|data:image/png;base64,)""", html)
    assert "url(http" not in html
    # every figure of the audit is there (charts as inline SVG)
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
        assert f'id="{section}"' in html
    assert html.count("<svg") == 10
    assert "Playford D" in html and "505-515" in html  # the registry figure's citation
    assert "case mix differs" in html
    assert "Decision support only" in html
    # studies counted, not listed: no patient name, ID or study UID
    assert "Historia" not in html and "HVH0" not in html


def test_json_figures_match_the_journal(data_dir, capsys):
    code, out, _ = _run(capsys, "--data-dir", str(data_dir), "--json")
    assert code == 0
    data = json.loads(out)
    journal = open_journal(data_dir)
    try:
        rows = journal.audit_rows()
    finally:
        journal.close()
    assessed = [r for r in rows if r.outcome]
    assert data["studies"] == len(assessed)
    assert sum(data["outcomes"].values()) == len(assessed)
    tr = sum("tr_peak_velocity" in r.measures for r in assessed) / len(assessed)
    assert data["measures"]["tr_peak_velocity"] == pytest.approx(tr)
    # the demo history's older scanner never sends TR velocity
    assert data["devices"]["HV_ECHO_2"]["measures"]["tr_peak_velocity"] == 0.0
    assert data["devices"]["HV_ECHO_1"]["measures"]["tr_peak_velocity"] > 0.5
    assert set(data) >= {"studies", "outcomes", "measures", "devices", "missing", "processing"}


def test_period_selects_by_the_day_graded(data_dir, capsys):
    code, out, _ = _run(
        capsys, "--data-dir", str(data_dir), "--json", "--since", "2026-11-01", "--until",
        "2026-11-15",
    )  # fmt: skip
    assert code == 0
    data = json.loads(out)
    since = datetime(2026, 11, 1).timestamp()
    until = datetime(2026, 11, 16).timestamp()  # --until DATE includes that day
    journal = open_journal(data_dir)
    try:
        expected = [r for r in journal.audit_rows() if since <= r.graded_at < until and r.outcome]
    finally:
        journal.close()
    assert 0 < data["studies"] == len(expected) < 60
    assert set(data["by_month"]) == {"2026-11"}


def test_studies_listed_on_request_only(data_dir, tmp_path, capsys):
    page = tmp_path / "listed.html"
    code, out, _ = _run(
        capsys, "--data-dir", str(data_dir), "--json", "--list-studies", "--html", str(page)
    )
    assert code == 0
    data = json.loads(out)
    assert len(data["study_list"]) == 60
    assert data["study_list"][0]["patient_name"] == ""  # identity not recorded
    assert data["study_list"][0]["study_uid"] in page.read_text(encoding="utf-8")


def test_pdf(data_dir, tmp_path, capsys):
    pdf = tmp_path / "audit.pdf"
    code, _, _ = _run(capsys, "--data-dir", str(data_dir), "--pdf", str(pdf))
    assert code == 0 and pdf.read_bytes().startswith(b"%PDF")
    if shutil.which("pdftotext") is None:
        if os.environ.get("CI"):
            pytest.fail("pdftotext (poppler-utils) missing")
        pytest.skip("pdftotext (poppler-utils) missing")
    text = subprocess.run(
        ["pdftotext", "-layout", str(pdf), "-"], capture_output=True, text=True, check=True
    ).stdout
    assert "Diastolic function audit" in text
    assert "Playford D" in text and "Decision support only" in text
    assert "Measure availability by sending device" in text


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--since", "2026-13-01"], '--since "2026-13-01": expected a date YYYY-MM-DD'),
        (["--until", "yesterday"], '--until "yesterday": expected a date YYYY-MM-DD'),
        (["--since", "2026-11-10", "--until", "2026-11-01"], "is not before --until"),
    ],
)
def test_bad_periods_are_refused_in_one_line(data_dir, capsys, args, message):
    code, out, err = _run(capsys, "--data-dir", str(data_dir), *args)
    assert code == 2 and out == ""
    assert message in err and err.count("\n") == 1 and "Traceback" not in err


def test_no_journal(tmp_path, capsys):
    code, _, err = _run(capsys, "--data-dir", str(tmp_path / "nothing"))
    assert code == 2 and "no journal at" in err


def test_patient_identity_only_when_recorded_configured_and_listed(tmp_path, capsys):
    """Name and ID appear only in the study list, only when the configuration allows them,
    and only for studies whose identity the node recorded."""
    from test_audit_journal import FACTS, _grade, _receive

    data_dir = tmp_path / "node"
    journal = open_journal(data_dir)
    try:
        _receive(journal, "2.25.1", now=datetime(2026, 11, 20, 10).timestamp())
        _grade(journal, now=datetime(2026, 11, 20, 10, 1).timestamp(), facts=FACTS)
    finally:
        journal.close()
    allowed = tmp_path / "allowed.toml"
    allowed.write_text(
        f'[node]\ndata_dir = "{data_dir}"\n[audit]\ninclude_patient_identifiers = true\n'
    )
    page = tmp_path / "page.html"
    for args, shown in (
        (["--data-dir", str(data_dir), "--list-studies"], False),  # not configured
        (["--config", str(allowed)], False),  # configured, not listed
        (["--config", str(allowed), "--list-studies"], True),
    ):
        code, out, _ = _run(capsys, *args, "--json", "--html", str(page))
        assert code == 0
        html = page.read_text(encoding="utf-8")
        assert ("Testperson^Ada" in out) is shown and ("HV-0001" in out) is shown
        assert ("Testperson^Ada" in html) is shown


def test_invented_history_in_a_span_without_working_hours():
    """The demo history picks working hours; a span with none (a Saturday night) still gives
    its studies, inside the span."""
    from service.demo.history import invented_studies

    saturday_night = datetime(2026, 11, 28, 23, 0).timestamp()  # a Saturday
    studies = list(invented_studies(3, days=0.1, now=saturday_night, seed=3))
    assert len(studies) == 3
    assert all(saturday_night - 0.1 * 86400 <= h.received_at < saturday_night for h in studies)
