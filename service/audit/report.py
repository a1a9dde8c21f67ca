"""The audit's figures over a period, from the journal's audit rows (pure: rows in, a report
out).  Every figure is a count with its share; the JSON form is the report's ``model_dump``,
documented key by key in docs/audit.md.

Denominators
------------
* ``studies``: studies the node assessed in the period (graded by a guideline algorithm, any
  outcome); studies it could not assess (sources rejected, internal error) are counted apart
  (``not_assessed``) and appear under processing failures.
* outcome, pathway and month shares, measure availability, borderline and disagreement shares:
  of ``studies`` (or of the studies of that pathway, month or device).
* indeterminate share by pathway: of the studies on that pathway to which the algorithm could
  be applied (normal, grade I-III or indeterminate; "not gradable" excluded), as the registry
  it is shown beside counted.
* missing measures: of the studies that ended indeterminate or not gradable.

Times are the node's: a study belongs to the period, month and day in which it was graded
(local time of the machine running the audit).
"""

from __future__ import annotations

import math
import statistics
import time
from collections import Counter, defaultdict
from collections.abc import Iterable, Sequence
from datetime import datetime
from typing import Any

from pydantic import BaseModel, ConfigDict, Field

from service.audit.counterfactual import ACQUIRED
from service.audit.references import CASE_MIX_CAVEAT, REGISTRY_FIGURES
from service.model import CAUTION, Measure, Outcome, Pathway
from service.store.audit_records import failure_kind

M = Measure

#: measures whose availability the audit reports: the ones every rule set leans on ...
CORE_MEASURES: tuple[Measure, ...] = (
    M.mitral_e,
    M.mitral_a,
    M.e_a_ratio,
    M.deceleration_time,
    M.e_prime_septal,
    M.e_prime_lateral,
    M.e_e_prime_average,
    M.tr_peak_velocity,
    M.lavi,
    M.lvef,
)
#: ... and the supplementary ones (second-line criteria, AF and special-situation rules)
SUPPLEMENTARY_MEASURES: tuple[Measure, ...] = (
    M.pasp,
    M.ivrt,
    M.pv_s_d_ratio,
    M.la_reservoir_strain,
    M.ar_a_duration,
    M.e_acceleration_rate,
    M.mitral_e_valsalva,
)
REPORTED_MEASURES = CORE_MEASURES + SUPPLEMENTARY_MEASURES

#: outcomes at which the algorithm was applied (the registry's denominator)
APPLIED = (
    Outcome.normal,
    Outcome.grade_1,
    Outcome.grade_2,
    Outcome.grade_3,
    Outcome.indeterminate,
)
UNDECIDED = (Outcome.indeterminate, Outcome.not_gradable)
#: z for a two-sided 95 % interval
Z95 = 1.959963984540054


class Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class Share(Model):
    count: int
    of: int  # the denominator
    share: float | None  # count / of, None when of = 0


def share(count: int, of: int) -> Share:
    return Share(count=count, of=of, share=None if of == 0 else count / of)


def wilson_interval(count: int, n: int, z: float = Z95) -> tuple[float, float] | None:
    """Wilson score interval of a proportion (Wilson EB, J Am Stat Assoc 1927;22:209-212), the
    interval scipy's ``BinomTestResult.proportion_ci(method="wilson")`` gives; None for n = 0."""
    if n <= 0:
        return None
    p = count / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return round(max(0.0, centre - half), 9), round(min(1.0, centre + half), 9)


class IndeterminateByPathway(Model):
    pathway: Pathway
    indeterminate: Share  # of the studies on this pathway the algorithm was applied to
    ci95: tuple[float, float] | None
    registry_share: float | None = None
    registry: str = ""
    registry_group: str = ""
    citation: str = ""
    verified: str = ""


class DeviceFigures(Model):
    studies: int
    measures: dict[str, float]  # measure -> share of this device's studies that had it
    calling_ae: str = ""
    station_name: str = ""
    manufacturer: str = ""
    model: str = ""
    outcomes: dict[str, int] = Field(default_factory=dict)


class MissingMeasure(Model):
    measure: Measure
    #: undecided studies this measure would have decided whatever its value
    would_decide: int
    #: undecided studies it could have decided for some of its values (includes would_decide)
    could_decide: int
    of: int  # undecided studies (indeterminate or not gradable)


class Cutoff(Model):
    label: str  # e.g. "Average E/e′ > 14"
    measure: Measure
    studies: int


class Borderline(Model):
    studies: Share
    cutoffs: list[Cutoff]


class OutcomePair(Model):
    """Studies where the primary guideline gave one outcome and another guideline another."""

    guideline: str  # the primary guideline
    outcome: str
    other_guideline: str
    other_outcome: str  # the same as outcome when only the filling pressure differed
    studies: int


class Disagreement(Model):
    compared: int  # studies evaluated by more than one guideline
    disagree: Share  # of compared
    assessed_without_comparison: int
    pairs: list[OutcomePair] = Field(default_factory=list)  # most frequent first


class Processing(Model):
    days: int  # days in the period with at least one study
    per_day: dict[str, int]  # local date -> studies graded
    per_day_mean: float | None
    per_day_max: int
    delivered: int  # studies whose result was delivered
    latency_p50_seconds: float | None  # last object received -> result delivered
    latency_p95_seconds: float | None
    failed: int  # studies failed (not assessed, or a delivery failed), at present
    failures: dict[str, int]  # failure kind -> studies


class Study(Model):
    """One study, listed only on request (patient identity only when recorded)."""

    study_uid: str
    graded: str
    device: str
    outcome: str | None
    pathway: str | None
    borderline: list[str]
    failure: str
    patient_name: str = ""
    patient_id: str = ""


class AuditReport(Model):
    generated: str
    since: str | None
    until: str | None
    studies: int
    not_assessed: int
    outcomes: dict[str, int]
    outcome_shares: dict[str, float | None]
    by_pathway: dict[str, dict[str, int]]
    by_month: dict[str, dict[str, int]]
    guidelines: dict[str, int]
    indeterminate_by_pathway: list[IndeterminateByPathway]
    measures: dict[str, float]
    measure_counts: dict[str, int]
    devices: dict[str, DeviceFigures]
    missing: list[MissingMeasure]
    undecided: int
    borderline: Borderline
    disagreement: Disagreement
    processing: Processing
    caveat: str = CASE_MIX_CAVEAT
    caution: str = CAUTION
    study_list: list[Study] | None = None


def _local(ts: float) -> datetime:
    return datetime.fromtimestamp(ts)


#: seconds per bucket of the day/month cache: every time zone's offset is a multiple of it
_QUARTER_HOUR = 900


class _Calendar:
    """Local day and month of a time, computed once per quarter hour (time zones differ from
    UTC by whole quarter hours)."""

    def __init__(self) -> None:
        self._cache: dict[int, tuple[str, str]] = {}

    def __call__(self, ts: float) -> tuple[str, str]:
        key = int(ts // _QUARTER_HOUR)
        hit = self._cache.get(key)
        if hit is None:
            local = _local(key * _QUARTER_HOUR)
            hit = self._cache[key] = (local.strftime("%Y-%m-%d"), local.strftime("%Y-%m"))
        return hit


def percentile(values: Sequence[float], q: int) -> float | None:
    """The q-th percentile (1-99) by linear interpolation between closest ranks
    (``statistics.quantiles(method="inclusive")``, numpy's default method); None when empty."""
    if not values:
        return None
    if len(values) == 1:
        return float(values[0])
    return float(statistics.quantiles(values, n=100, method="inclusive")[q - 1])


def build_report(
    rows: Iterable[Any],
    *,
    since: float | None = None,
    until: float | None = None,
    list_studies: bool = False,
    now: float | None = None,
) -> AuditReport:
    """The audit of ``rows`` (journal audit rows of the period [since, until))."""
    now = time.time() if now is None else now
    outcomes: Counter[str] = Counter()
    by_pathway: dict[str, Counter[str]] = defaultdict(Counter)
    by_month: dict[str, Counter[str]] = defaultdict(Counter)
    guidelines: Counter[str] = Counter()
    measure_counts: Counter[str] = Counter()
    devices: dict[str, dict[str, Any]] = {}
    missing_would: Counter[str] = Counter()
    missing_could: Counter[str] = Counter()
    cutoffs: Counter[tuple[str, str]] = Counter()
    pairs: Counter[tuple[str, str, str, str]] = Counter()
    per_day: Counter[str] = Counter()
    failures: Counter[str] = Counter()
    latencies: list[float] = []
    studies = not_assessed = borderline = compared = disagree = undecided = 0
    delivered = failed = 0
    listed: list[Study] = []
    calendar = _Calendar()
    for r in rows:
        day, month = calendar(r.graded_at)
        per_day[day] += 1
        if r.failure:
            failed += 1
            failures[failure_kind(r.failure)] += 1
        if r.delivered_at is not None and r.last_received_at is not None:
            delivered += 1
            latencies.append(max(0.0, r.delivered_at - r.last_received_at))
        if r.outcome is None:
            not_assessed += 1
        else:
            studies += 1
            outcomes[r.outcome] += 1
            by_month[month][r.outcome] += 1
            if r.pathway:
                by_pathway[r.pathway][r.outcome] += 1
            if r.guideline:
                guidelines[r.guideline] += 1
            present = r.measures  # each measure once
            measure_counts.update(present)
            dev = devices.setdefault(
                r.device,
                {
                    "studies": 0,
                    "counts": Counter(),
                    "outcomes": Counter(),
                    "header": Counter(),
                },
            )
            dev["studies"] += 1
            dev["counts"].update(present)
            dev["outcomes"][r.outcome] += 1
            dev["header"][(r.calling_ae, r.station_name, r.manufacturer, r.model)] += 1
            if r.borderline:
                borderline += 1
                for cut in {(c["label"], c["measure"]) for c in r.borderline}:
                    cutoffs[cut] += 1
            if r.compared > 1:
                compared += 1
                disagree += bool(r.disagreement)
                for other, other_outcome in r.other_outcomes:
                    pairs[(r.guideline or "", r.outcome, other, other_outcome)] += 1
            if r.outcome in UNDECIDED:
                undecided += 1
                for effect in r.missing:
                    if effect.get("sometimes"):
                        missing_could[effect["measure"]] += 1
                    if effect.get("always"):
                        missing_would[effect["measure"]] += 1
        if list_studies:
            listed.append(
                Study(
                    study_uid=r.study_uid,
                    graded=_local(r.graded_at).strftime("%Y-%m-%d %H:%M"),
                    device=r.device,
                    outcome=r.outcome,
                    pathway=r.pathway,
                    borderline=[c["label"] for c in r.borderline],
                    failure=failure_kind(r.failure) if r.failure else "",
                    patient_name=r.patient_name,
                    patient_id=r.patient_id,
                )
            )

    all_outcomes = [o.value for o in Outcome]
    indeterminate = []
    for pathway in Pathway:
        counts = by_pathway.get(pathway.value)
        registry = next((f for f in REGISTRY_FIGURES if f.pathway is pathway), None)
        if pathway not in (
            Pathway.normal_lvef,
            Pathway.reduced_lvef_or_myocardial_disease,
            Pathway.sinus_general,
        ) or (counts is None and registry is None):
            continue
        counts = counts or Counter()
        applied = sum(counts[o.value] for o in APPLIED)
        n_ind = counts[Outcome.indeterminate.value]
        indeterminate.append(
            IndeterminateByPathway(
                pathway=pathway,
                indeterminate=share(n_ind, applied),
                ci95=wilson_interval(n_ind, applied),
                registry_share=None if registry is None else registry.indeterminate_share,
                registry="" if registry is None else registry.registry,
                registry_group="" if registry is None else registry.group,
                citation="" if registry is None else registry.citation,
                verified="" if registry is None else registry.verified,
            )
        )

    device_figures = {}
    for key in sorted(devices):
        dev = devices[key]
        calling, station, manufacturer, model = dev["header"].most_common(1)[0][0]
        n = dev["studies"]
        device_figures[key] = DeviceFigures(
            studies=n,
            measures={m.value: dev["counts"][m.value] / n for m in REPORTED_MEASURES},
            calling_ae=calling,
            station_name=station,
            manufacturer=manufacturer,
            model=model,
            outcomes={o: dev["outcomes"][o] for o in all_outcomes if dev["outcomes"][o]},
        )

    missing = sorted(
        (
            MissingMeasure(
                measure=Measure(m),
                would_decide=missing_would[m],
                could_decide=missing_could[m],
                of=undecided,
            )
            for m in {*missing_could, *missing_would}
        ),
        key=lambda x: (-x.could_decide, -x.would_decide, ACQUIRED.index(x.measure)),
    )
    days = sorted(per_day)
    return AuditReport(
        generated=_local(now).isoformat(timespec="seconds"),
        since=None if since is None else _local(since).isoformat(timespec="seconds"),
        until=None if until is None else _local(until).isoformat(timespec="seconds"),
        studies=studies,
        not_assessed=not_assessed,
        outcomes={o: outcomes[o] for o in all_outcomes},
        outcome_shares={o: share(outcomes[o], studies).share for o in all_outcomes},
        by_pathway={
            p.value: {o: by_pathway[p.value][o] for o in all_outcomes}
            for p in Pathway
            if p.value in by_pathway
        },
        by_month={m: {o: by_month[m][o] for o in all_outcomes} for m in sorted(by_month)},
        guidelines=dict(sorted(guidelines.items())),
        indeterminate_by_pathway=indeterminate,
        measures={
            m.value: (measure_counts[m.value] / studies if studies else 0.0)
            for m in REPORTED_MEASURES
        },
        measure_counts={m.value: measure_counts[m.value] for m in REPORTED_MEASURES},
        devices=device_figures,
        missing=missing,
        undecided=undecided,
        borderline=Borderline(
            studies=share(borderline, studies),
            cutoffs=[
                Cutoff(label=label, measure=Measure(measure), studies=n)
                for (label, measure), n in sorted(cutoffs.items(), key=lambda kv: (-kv[1], kv[0]))
            ],
        ),
        disagreement=Disagreement(
            compared=compared,
            disagree=share(disagree, compared),
            assessed_without_comparison=studies - compared,
            pairs=[
                OutcomePair(guideline=g, outcome=o, other_guideline=og, other_outcome=oo, studies=n)
                for (g, o, og, oo), n in sorted(pairs.items(), key=lambda kv: (-kv[1], kv[0]))
            ],
        ),
        processing=Processing(
            days=len(days),
            per_day={d: per_day[d] for d in days},
            per_day_mean=(sum(per_day.values()) / len(days)) if days else None,
            per_day_max=max(per_day.values(), default=0),
            delivered=delivered,
            latency_p50_seconds=percentile(latencies, 50),
            latency_p95_seconds=percentile(latencies, 95),
            failed=failed,
            failures=dict(sorted(failures.items(), key=lambda kv: (-kv[1], kv[0]))),
        ),
        study_list=listed if list_studies else None,
    )


def report_json(report: AuditReport) -> dict[str, Any]:
    """The JSON document of ``audit --json`` (keys documented in docs/audit.md)."""
    return report.model_dump(mode="json", exclude_none=False)
