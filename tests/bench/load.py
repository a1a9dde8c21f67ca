"""Benchmark load: invented echo measurement SRs (fictional "Harbour Vale Cardiac Centre"),
one SR per study, with values varied by a seeded random generator so that the grading takes
every pathway (normal, grades 1-3, indeterminate, reduced LVEF) rather than one cached shape."""

from __future__ import annotations

import random
from collections.abc import Iterator
from pathlib import Path

from pydicom import Dataset

from service.model import Measure as M
from service.sr.echo_builder import (
    POST_5302,
    PRE,
    SECTION_5200,
    EchoItem,
    Encoding,
    Patient,
    SopClass,
    Study,
    Template,
    build_echo_sr,
)


def bench_study(i: int, rng: random.Random, *, run: str = "bench") -> Dataset:
    """Study number ``i`` of a benchmark run: a TID 5300 or TID 5200 SR of 7-10 measurements."""
    template = Template.tid5200 if i % 3 == 2 else Template.tid5300
    if template is Template.tid5200:
        encodings = (Encoding.tid5200,)
    else:
        encodings = (Encoding.pre, Encoding.post)
    enc = encodings[i % len(encodings)]
    values: list[tuple[M, float, str]] = [
        (M.lvef, round(rng.uniform(25, 70)), "%"),
        (M.mitral_e, round(rng.uniform(40, 130)), "cm/s"),
        (M.mitral_a, round(rng.uniform(30, 100)), "cm/s"),
        (M.e_prime_septal, round(rng.uniform(3.5, 12), 1), "cm/s"),
        (M.e_prime_lateral, round(rng.uniform(5, 16), 1), "cm/s"),
        (M.tr_peak_velocity, round(rng.uniform(1.8, 3.6), 2), "m/s"),
        (M.lavi, round(rng.uniform(18, 52)), "ml/m2"),
    ]
    if rng.random() < 0.5:
        values.append((M.deceleration_time, round(rng.uniform(140, 260)), "ms"))
    if rng.random() < 0.3:
        values.append((M.pv_s_d_ratio, round(rng.uniform(0.5, 1.6), 2), "{ratio}"))
    if rng.random() < 0.15:  # an incomplete study now and then
        values = values[: rng.randint(2, 5)]
    items = []
    for measure, value, unit in values:
        e = enc
        recipes = {Encoding.post: POST_5302, Encoding.tid5200: SECTION_5200}
        if e in recipes and measure not in recipes[e]:
            e = Encoding.pre  # no recipe for this measure in that encoding
        if e is Encoding.pre and measure not in PRE:
            continue
        items.append(EchoItem(measure=measure, value=value, unit=unit, encoding=e))
    return build_echo_sr(
        items,
        patient=Patient(
            name=f"Benchmark^Case{i:05d}",
            id=f"HVB{i:06d}",
            birth_date=f"19{rng.randint(30, 99):02d}0{rng.randint(1, 9)}1{rng.randint(0, 9)}",
            sex="F" if i % 2 else "M",
            age=f"0{rng.randint(20, 89):02d}Y",
        ),
        study=Study(
            seed=f"{run}-{i}",
            accession=f"HVB{i:07d}",
            study_id=str(i % 10000),
            study_date="20261101",
            study_time="091500",
        ),
        sop_class=SopClass.comprehensive,
        template=template,
    )


def iter_studies(
    n: int, *, seed: int = 2026, start: int = 0, run: str = "bench"
) -> Iterator[Dataset]:
    rng = random.Random(seed * 1_000_003 + start)
    for i in range(start, start + n):
        yield bench_study(i, rng, run=run)


def write_studies(
    folder: Path, n: int, *, seed: int = 2026, start: int = 0, run: str = "bench"
) -> list[Path]:
    """``n`` study files in ``folder`` (Part 10, explicit VR little endian)."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for k, ds in enumerate(iter_studies(n, seed=seed, start=start, run=run)):
        p = folder / f"s{start + k:06d}.dcm"
        ds.save_as(p, enforce_file_format=True)
        paths.append(p)
    return paths
