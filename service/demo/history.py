"""An invented history for the audit's demonstration: months of studies from the fictional
Harbour Vale Cardiac Centre's three scanners, graded by the real pipeline and recorded in a
node's journal with invented times, as the node would have recorded them.

Everything here is made up: patients, devices, values and times.  The scanners differ the way
real ones do: ``HV_ECHO_1`` sends the full protocol, ``HV_ECHO_2`` (an older model) never sends
the TR velocity, and the portable ``HV_WARD`` often lacks LA volume index and lateral e′.
"""

from __future__ import annotations

import random
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from service.model import Context, Measure, SpecialSituation
from service.sr.echo_builder import EchoItem, Equipment, Patient, Study, build_echo_sr

M = Measure
DAY = 86400.0


@dataclass(frozen=True)
class Scanner:
    calling_ae: str
    equipment: Equipment
    #: chance that each measure is missing from a study of this scanner (besides the lab's
    #: usual gaps)
    gaps: dict[Measure, float]


SCANNERS: tuple[Scanner, ...] = (
    Scanner(
        "HV_ECHO_1",
        Equipment(model="HV-Echo 9", station_name="HV-ECHO-1", serial_number="HV-9-0041"),
        {},
    ),
    Scanner(
        "HV_ECHO_2",
        Equipment(model="HV-Echo 5", station_name="HV-ECHO-2", serial_number="HV-5-0017"),
        {M.tr_peak_velocity: 1.0},
    ),
    Scanner(
        "HV_WARD",
        Equipment(model="HV-Echo Go", station_name="HV-PORTABLE", serial_number="HV-G-0003"),
        {M.lavi: 0.45, M.e_prime_lateral: 0.3, M.deceleration_time: 0.5},
    ),
)
#: share of the lab's studies done on each scanner
SCANNER_WEIGHTS = (0.5, 0.3, 0.2)
#: gaps every scanner has (TR jets are not always measurable, views are sometimes missed)
USUAL_GAPS = {
    M.tr_peak_velocity: 0.12,
    M.lavi: 0.06,
    M.e_prime_septal: 0.04,
    M.e_prime_lateral: 0.06,
    M.deceleration_time: 0.2,
}

#: (share of studies, ranges of each measure) for each kind of heart the history invents
KINDS: tuple[tuple[str, float, dict[Measure, tuple[float, float]]], ...] = (
    (
        "normal",
        0.46,
        {
            M.mitral_e: (58, 95),
            M.mitral_a: (42, 78),
            M.e_prime_septal: (6.5, 12),
            M.e_prime_lateral: (9, 16),
            M.tr_peak_velocity: (1.8, 2.9),
            M.lavi: (18, 36),
            M.lvef: (53, 68),
            M.deceleration_time: (150, 230),
        },
    ),
    (
        "impaired relaxation",
        0.2,
        {
            M.mitral_e: (38, 70),
            M.mitral_a: (62, 98),
            M.e_prime_septal: (4, 7.5),
            M.e_prime_lateral: (5.5, 10.5),
            M.tr_peak_velocity: (2.0, 3.0),
            M.lavi: (24, 38),
            M.lvef: (30, 66),
            M.deceleration_time: (200, 290),
        },
    ),
    (
        "raised filling pressure",
        0.16,
        {
            M.mitral_e: (78, 118),
            M.mitral_a: (55, 92),
            M.e_prime_septal: (3.8, 7),
            M.e_prime_lateral: (5, 9.5),
            M.tr_peak_velocity: (2.6, 3.5),
            M.lavi: (30, 50),
            M.lvef: (30, 65),
            M.deceleration_time: (140, 200),
        },
    ),
    (
        "restrictive",
        0.05,
        {
            M.mitral_e: (95, 135),
            M.mitral_a: (30, 52),
            M.e_prime_septal: (3.2, 5.5),
            M.e_prime_lateral: (4.2, 7),
            M.tr_peak_velocity: (2.9, 3.9),
            M.lavi: (40, 62),
            M.lvef: (18, 42),
            M.deceleration_time: (110, 160),
        },
    ),
    (
        "limited study",
        0.03,
        {M.mitral_e: (55, 100), M.mitral_a: (45, 85), M.lvef: (45, 65)},
    ),
    (
        "atrial fibrillation",
        0.11,
        {
            M.mitral_e: (70, 125),
            M.e_prime_septal: (5, 10),
            M.e_prime_lateral: (7, 13),
            M.tr_peak_velocity: (2.3, 3.4),
            M.lavi: (34, 60),
            M.lvef: (35, 62),
            M.deceleration_time: (130, 210),
        },
    ),
)
AF_CODE = ("49436004", "SCT", "Atrial Fibrillation")


@dataclass(frozen=True)
class HistoryStudy:
    """One invented study: its SR, sending scanner, context and times."""

    dataset: object
    scanner: Scanner
    context: Context
    received_at: float
    outage: bool


def _items(rng: random.Random, kind: str, scanner: Scanner) -> list[EchoItem]:
    ranges = next(r for k, _, r in KINDS if k == kind)
    items = []
    for measure, (low, high) in ranges.items():
        gap = max(USUAL_GAPS.get(measure, 0.0), scanner.gaps.get(measure, 0.0))
        if rng.random() < gap:
            continue
        value = round(rng.uniform(low, high), 2 if measure is M.tr_peak_velocity else 1)
        items.append(EchoItem(measure=measure, value=value))
    return items


def invented_studies(
    count: int, *, days: int = 180, now: float | None = None, seed: int = 2026
) -> Iterator[HistoryStudy]:
    """``count`` invented studies spread over working days of the last ``days`` days."""
    from service.model import Code

    rng = random.Random(seed)
    now = time.time() if now is None else now
    start = now - days * DAY
    # two afternoons when the PACS was down: results went out hours late
    outages = [(start + days * DAY * f, 4 * 3600.0) for f in (0.35, 0.8)]
    times: list[float] = []
    tries = 0
    while len(times) < count:
        t = start + rng.random() * days * DAY
        tries += 1
        lt = time.localtime(t)
        # working hours on working days, while the span has any (a short span may not)
        if tries < 50 * count and (lt.tm_wday >= 5 or not 8 <= lt.tm_hour < 18):
            continue
        times.append(min(t, now - 60.0))
    times.sort()
    kinds = [k for k, _, _ in KINDS]
    weights = [w for _, w, _ in KINDS]
    for n, t in enumerate(times, 1):
        scanner = rng.choices(SCANNERS, weights=SCANNER_WEIGHTS)[0]
        kind = rng.choices(kinds, weights=weights)[0]
        lt = time.localtime(t)
        rhythm = Code(value=AF_CODE[0], scheme=AF_CODE[1], meaning=AF_CODE[2])
        ds = build_echo_sr(
            _items(rng, kind, scanner),
            patient=Patient(
                name=f"Historia^Case{n:05d}",
                id=f"HVH{n:06d}",
                birth_date=f"19{rng.randint(30, 99):02d}0{rng.randint(1, 9)}1{rng.randint(0, 9)}",
                sex=rng.choice("FM"),
                age=f"0{rng.randint(25, 92):02d}Y",
            ),
            study=Study(
                accession=f"HVH{n:06d}",
                study_id=str(n),
                study_date=time.strftime("%Y%m%d", lt),
                study_time=time.strftime("%H%M%S", lt),
                seed=f"harbour-vale-history-{seed}-{n}",
            ),
            rhythm=rhythm if kind == "atrial fibrillation" else None,
            equipment=scanner.equipment,
        )
        situations: frozenset[SpecialSituation] = frozenset()
        if rng.random() < 0.02:
            situations = frozenset({SpecialSituation.mitral_stenosis})
        outage = any(o <= t < o + length for o, length in outages)
        yield HistoryStudy(
            dataset=ds,
            scanner=scanner,
            context=Context(special_situations=situations),
            received_at=t,
            outage=outage,
        )


def fill_history(
    data_dir: Path,
    count: int = 400,
    *,
    days: int = 180,
    now: float | None = None,
    seed: int = 2026,
    destination: tuple[str, str] = ("PACS", "HV_PACS@pacs.harbourvale.invalid:104"),
) -> int:
    """Grade ``count`` invented studies with the real pipeline and record each in the journal
    of ``data_dir`` as the node does (received, graded with its audit facts, delivered), at
    invented times.  Returns the number recorded."""
    from service.audit.facts import study_facts
    from service.demo.scenario import SITE_MAPPING
    from service.pipeline import GradeOptions, grade_study
    from service.sr.encode import file_bytes
    from service.store.journal import NewResult, open_journal
    from service.vocabulary.mapper import load_mapping_table

    data_dir = Path(data_dir)
    table = load_mapping_table([SITE_MAPPING])
    journal = open_journal(data_dir)
    rng = random.Random(seed + 1)
    recorded = 0
    try:
        for h in invented_studies(count, days=days, now=now, seed=seed):
            ds = h.dataset
            study_uid = str(ds.StudyInstanceUID)
            sop_uid = str(ds.SOPInstanceUID)
            t0 = h.received_at
            journal.store_object(
                sop_instance_uid=sop_uid,
                study_uid=study_uid,
                sop_class_uid=str(ds.SOPClassUID),
                transfer_syntax=str(ds.file_meta.TransferSyntaxUID),
                calling_ae=h.scanner.calling_ae,
                data=file_bytes(ds),
                settle_seconds=10.0,
                now=t0,
            )
            t1 = t0 + 10.0 + rng.uniform(0.01, 0.3)
            claims = journal.claim_due(now=t1, limit=1)
            claim = next(c for c in claims if c.study_uid == study_uid)
            options = GradeOptions(context=h.context)
            outcome = grade_study([ds], options, table=table)
            facts = study_facts(outcome, [ds], options, calling_ae=h.scanner.calling_ae)
            t2 = t1 + rng.uniform(0.02, 0.12)
            if outcome.result is None:
                journal.finish_grading(
                    claim,
                    result=None,
                    failure=f"{outcome.status.value}: {outcome.reason}",
                    audit=facts,
                    now=t2,
                )
                recorded += 1
                continue
            result = outcome.result
            result_uid = str(result.SOPInstanceUID)
            journal.finish_grading(
                claim,
                result=NewResult(
                    result_uid=result_uid,
                    series_uid=str(result.SeriesInstanceUID),
                    sop_class_uid=str(result.SOPClassUID),
                    status=outcome.status.value,
                    guideline=outcome.assessment.guideline.value if outcome.assessment else None,
                    grade=outcome.assessment.grade.value if outcome.assessment else None,
                    filling_pressure=(
                        outcome.assessment.filling_pressure.value if outcome.assessment else None
                    ),
                    sources=(sop_uid,),
                    predecessors=(),
                    data=file_bytes(result),
                ),
                destinations=[destination],
                audit=facts,
                now=t2,
            )
            delay = rng.uniform(2 * 3600, 4 * 3600) if h.outage else rng.uniform(0.03, 0.4)
            for d in journal.deliveries(states=["pending"], result_uid=result_uid):
                journal.mark_delivered(d["id"], now=t2 + delay)
            recorded += 1
    finally:
        journal.close()
    return recorded
