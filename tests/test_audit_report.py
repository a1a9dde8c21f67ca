"""The audit's figures from journal rows: every count with its share, and the denominators
docs/audit.md states."""

from __future__ import annotations

import statistics
from datetime import datetime

import pytest

from service.audit.report import build_report, percentile, report_json, wilson_interval
from service.store.audit_records import AuditRow

ALL = ("tr_peak_velocity", "lavi", "mitral_e", "mitral_a", "e_prime_septal", "lvef")


def _t(day: str, hour: int = 10) -> float:
    return datetime.fromisoformat(f"{day}T{hour:02d}:00:00").timestamp()


def row(
    n: int,
    outcome: str | None,
    *,
    pathway: str | None = "normal-lvef",
    device: str = "HV_ECHO_1",
    measures=ALL,
    day: str = "2026-11-02",
    borderline=(),
    missing=(),
    compared: int = 2,
    disagreement: bool | None = False,
    failure: str = "",
    latency: float | None = 12.0,
    other_outcomes=(),
) -> AuditRow:
    graded = _t(day) + n
    return AuditRow(
        study_uid=f"2.25.{n}",
        graded_at=graded,
        last_received_at=graded - 10,
        delivered_at=None if latency is None else graded - 10 + latency,
        status="graded" if outcome else "rejected",
        outcome=outcome,
        pathway=pathway if outcome else None,
        guideline="ase-eacvi-2016" if outcome else None,
        device=device,
        calling_ae=device,
        station_name=f"station of {device}",
        manufacturer="Harbour Vale (fictional)",
        model="HV-Echo",
        measures=tuple(measures),
        borderline=tuple(borderline),
        missing=tuple(missing),
        compared=compared,
        disagreement=disagreement,
        failure=failure,
        other_outcomes=tuple(other_outcomes),
    )


NO_TR = tuple(m for m in ALL if m != "tr_peak_velocity")
E_E = {"label": "Average E/e′ > 14", "measure": "e_e_prime_average"}
LAVI = {"label": "LAVI > 34 mL/m²", "measure": "lavi"}


@pytest.fixture
def rows():
    return [
        row(1, "normal", latency=10),
        row(2, "normal", device="HV_ECHO_2", measures=NO_TR, latency=20),
        row(3, "grade-1", pathway="reduced-lvef-or-myocardial-disease", borderline=[E_E]),
        row(
            4,
            "indeterminate",
            day="2026-12-01",
            borderline=[E_E, LAVI],
            disagreement=True,
            other_outcomes=[("ase-2025", "grade-1")],
        ),
        row(
            5,
            "indeterminate",
            device="HV_ECHO_2",
            measures=NO_TR,
            day="2026-12-01",
            missing=[{"measure": "tr_peak_velocity", "always": True, "sometimes": True}],
        ),
        row(
            6,
            "not-gradable",
            device="HV_ECHO_2",
            measures=("mitral_e", "lvef"),
            day="2026-12-01",
            missing=[
                {"measure": "tr_peak_velocity", "always": False, "sometimes": True},
                {"measure": "lavi", "always": False, "sometimes": True},
            ],
            compared=1,
            disagreement=None,
        ),
        row(7, "atrial-fibrillation", pathway="atrial-fibrillation", day="2026-12-01"),
        row(
            8,
            None,
            day="2026-12-01",
            failure="rejected: no echo measurement recognised",
            latency=None,
        ),
        row(
            9,
            "grade-2",
            day="2026-12-01",
            failure="delivery to PACS: gave up after 3 attempts: cannot connect to "
            "PACS@10.0.0.5:104: refused",
            latency=None,
        ),
    ]


def test_outcomes_counted_with_shares_of_the_studies_assessed(rows):
    r = build_report(rows)
    assert (r.studies, r.not_assessed) == (8, 1)
    assert r.outcomes == {
        "normal": 2,
        "grade-1": 1,
        "grade-2": 1,
        "grade-3": 0,
        "indeterminate": 2,
        "not-gradable": 1,
        "atrial-fibrillation": 1,
        "special-situation": 0,
    }
    assert r.outcome_shares["indeterminate"] == 2 / 8
    assert r.by_pathway["normal-lvef"]["indeterminate"] == 2
    assert r.by_pathway["reduced-lvef-or-myocardial-disease"]["grade-1"] == 1
    assert list(r.by_month) == ["2026-11", "2026-12"]
    assert sum(r.by_month["2026-12"].values()) == 5


def test_indeterminate_share_leaves_not_gradable_out_as_the_registry_did(rows):
    r = build_report(rows)
    normal = next(x for x in r.indeterminate_by_pathway if x.pathway.value == "normal-lvef")
    # normal-LVEF pathway: normal 2, grade-2 1, indeterminate 2, not gradable 1 -> 2 of 5
    assert (normal.indeterminate.count, normal.indeterminate.of) == (2, 5)
    # Playford et al., Eur Heart J Cardiovasc Imaging 2021;22:505-515 (NEDA), abstract
    assert normal.registry_share == 0.215
    reduced = next(x for x in r.indeterminate_by_pathway if x.pathway.value.startswith("reduced"))
    assert reduced.registry_share == 0.622
    assert "Eur Heart J Cardiovasc Imaging 2021;22(5):505-515" in reduced.citation


def test_measure_availability_overall_and_per_device(rows):
    r = build_report(rows)
    assert r.measures["tr_peak_velocity"] == 5 / 8
    assert r.measure_counts["tr_peak_velocity"] == 5
    assert r.devices["HV_ECHO_1"].studies == 5
    assert r.devices["HV_ECHO_1"].measures["tr_peak_velocity"] == 1.0
    assert r.devices["HV_ECHO_2"].studies == 3
    assert r.devices["HV_ECHO_2"].measures["tr_peak_velocity"] == 0.0
    assert r.devices["HV_ECHO_2"].station_name == "station of HV_ECHO_2"


def test_missing_measures_over_the_undecided_studies(rows):
    r = build_report(rows)
    assert r.undecided == 3
    tr, lavi = r.missing
    assert (tr.measure.value, tr.would_decide, tr.could_decide, tr.of) == (
        "tr_peak_velocity",
        1,
        2,
        3,
    )
    assert (lavi.measure.value, lavi.would_decide, lavi.could_decide) == ("lavi", 0, 1)


def test_borderline_disagreement_and_processing(rows):
    r = build_report(rows)
    assert (r.borderline.studies.count, r.borderline.studies.of) == (2, 8)
    assert [(c.label, c.studies) for c in r.borderline.cutoffs] == [
        ("Average E/e′ > 14", 2),
        ("LAVI > 34 mL/m²", 1),
    ]
    assert (r.disagreement.compared, r.disagreement.disagree.count) == (7, 1)
    assert r.disagreement.assessed_without_comparison == 1
    (pair,) = r.disagreement.pairs
    assert (pair.guideline, pair.outcome, pair.other_guideline, pair.other_outcome) == (
        "ase-eacvi-2016",
        "indeterminate",
        "ase-2025",
        "grade-1",
    )
    assert pair.studies == 1
    p = r.processing
    assert p.per_day == {"2026-11-02": 3, "2026-12-01": 6}
    assert p.delivered == 7
    latencies = [10, 20, 12, 12, 12, 12, 12]
    assert p.latency_p50_seconds == statistics.median(latencies)
    assert p.failed == 2
    assert p.failures == {
        "delivery to PACS: cannot connect to PACS@10.0.0.5": 1,
        "rejected: no echo measurement recognised": 1,
    }


def test_json_has_the_documented_keys(rows):
    data = report_json(build_report(rows))
    assert data["studies"] == 8
    assert data["outcomes"]["indeterminate"] == 2
    assert data["measures"]["tr_peak_velocity"] == 5 / 8
    assert data["devices"]["HV_ECHO_2"]["studies"] == 3
    assert data["devices"]["HV_ECHO_2"]["measures"]["tr_peak_velocity"] == 0.0
    assert "study_list" in data and data["study_list"] is None  # counted, not listed
    assert "2.25.1" not in str(data)


def test_studies_listed_only_on_request(rows):
    listed = build_report(rows, list_studies=True).study_list
    assert [s.study_uid for s in listed] == [f"2.25.{n}" for n in range(1, 10)]


def test_empty_period():
    r = build_report([])
    assert r.studies == 0
    assert r.outcome_shares["normal"] is None
    assert r.processing.latency_p50_seconds is None


def test_percentiles_interpolate_like_numpy():
    # numpy.percentile's default ("linear", Hyndman & Fan type 7) on 1..10: p50 5.5, p95 9.55
    values = list(range(1, 11))
    assert percentile(values, 50) == 5.5
    assert percentile(values, 95) == pytest.approx(9.55)
    assert percentile([3.0], 95) == 3.0
    assert percentile([], 50) is None


@pytest.mark.parametrize(
    ("count", "n", "low", "high"),
    [
        # Newcombe RG, Stat Med 1998;17:857-872, Table I, method 3 (score, no continuity
        # correction); values from memory
        (81, 263, 0.2553, 0.3662),
        (15, 148, 0.0624, 0.1605),
        (0, 20, 0.0, 0.1611),
        (1, 29, 0.0061, 0.1718),
    ],
)
def test_wilson_interval(count, n, low, high):
    lo, hi = wilson_interval(count, n)
    assert (round(lo, 4), round(hi, 4)) == (low, high)


def test_the_page_escapes_what_devices_send():
    """A calling AE title may hold '<' and '&' (PS3.5 Table 6.2-1 excludes only backslash and
    control characters), and a Station Name anything: the page escapes them (Jinja2
    autoescape), so they never become markup."""
    from service.audit.render import audit_html

    hostile = "<script>alert(1)</script>"
    r = build_report([row(1, "normal", device="<b>&AE</b>"), row(2, "normal", device=hostile)])
    html = audit_html(r)
    assert "<script>alert" not in html and "<b>&AE" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;b&gt;&amp;AE&lt;/b&gt;" in html


def test_dollar_signs_from_a_device_are_text(tmp_path):
    """matplotlib would read "$...$" as mathematical notation (and fail on a lone "$")."""
    from service.audit.pdf import audit_pdf
    from service.audit.render import audit_html

    r = build_report([row(1, "normal", device="ECHO$1"), row(2, "normal", device="A$x^{$B")])
    assert "ECHO$1" in audit_html(r)
    assert audit_pdf(r, tmp_path / "a.pdf").stat().st_size > 1000
