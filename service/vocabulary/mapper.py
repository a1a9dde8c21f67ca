"""Code -> canonical measure: matches every NUM observation of the source documents against
the site and standard mapping rules, converts units, checks plausibility, resolves repeats,
derives ratios and averages, and accounts for every observation (used, excluded with a
reason, or unrecognised).

Policies (selection vocabulary: DICOM PS3.16 TID 5301 / CID 224 / CID 3627):

* A site rule beats a standard rule; within each, a rule naming the concept beats a rule on
  "any concept", then the rule with more conditions wins, then table order.
* Several documents: for each quantity the most recently created SR (``created``, then SOP
  Instance UID for a stable order) that has a usable value wins; the others are excluded.
* Several encodings of one quantity in one SR (e.g. LVEF biplane and single-plane): the
  preferred rule (site first, then lowest ``priority``, then biplane method of disks or no
  Measurement Method before other methods) wins; the others are excluded.
* Repeats: one value with Selection Status -> that value; else the device's mean (Derivation =
  Mean); else the mean of the unmarked repeats ("mean of N unmarked repeats").
* Derived: average e' = (septal + lateral) / 2; E/A; E/e' septal, lateral and average
  (E / average e', not the mean of the site ratios); PV S/D; Ar-A.  A reported value that
  differs from the value computed from its components by more than 10 % is noted and the
  components are used.  Derived values and means are rounded to 2 decimals (half up).
"""

from __future__ import annotations

import hashlib
import json
import math
from collections import defaultdict
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from decimal import ROUND_HALF_UP, Decimal
from pathlib import Path

from pydantic import BaseModel, ConfigDict, PrivateAttr

from service.model import (
    Code,
    Exclusion,
    Measure,
    Measurements,
    MeasureValue,
    Observation,
    Origin,
    SourceDocument,
    Unrecognised,
)
from service.vocabulary.measures import (
    SPECS,
    VALSALVA_VARIANT,
    Component,
    Quantity,
    parse_quantity,
)
from service.vocabulary.rules import MODIFIER_NAMES, Rule, RuleOrigin
from service.vocabulary.site import load_site_files
from service.vocabulary.standard import STANDARD_RULES, code
from service.vocabulary.units import UnitError, convert, ucum

#: a reported ratio differing from its components by more than this fraction is replaced
DISAGREEMENT_FRACTION = 0.10

SELECTION_STATUS = MODIFIER_NAMES["selection_status"][0]
DERIVATION = MODIFIER_NAMES["derivation"][0]
STAGE = MODIFIER_NAMES["stage"][0]
METHOD = MODIFIER_NAMES["measurement_method"][0]
VALSALVA = code("valsalva")
MEAN = code("mean")
#: preference among several values that all carry Selection Status (common practice)
SELECTION_RANK = {code("user_chosen"): 0, code("mean_chosen"): 1, code("most_recent"): 2}


# ---------------------------------------------------------------------------------------------
# Mapping table
# ---------------------------------------------------------------------------------------------


class MappingEntry(BaseModel):
    """One rule as listed by a ``codes`` command."""

    model_config = ConfigDict(frozen=True)

    id: str
    origin: str  # "standard" or "site"
    concept: str  # "80070-6 LN \"Mitral valve E-wave Vmax\"" or "any concept"
    conditions: tuple[str, ...]
    measure: str
    priority: int
    source: str  # citation
    from_memory: bool = False


def _entry(rule: Rule) -> MappingEntry:
    concept = "any concept"
    if rule.concept is not None:
        concept = f"{rule.concept.value} {rule.concept.scheme}"
        if rule.concept.meaning:
            concept += f' "{rule.concept.meaning}"'
    return MappingEntry(
        id=rule.id,
        origin=rule.origin.value,
        concept=concept,
        conditions=tuple(c.describe() for c in rule.conditions),
        measure=rule.quantity,
        priority=rule.priority,
        source=rule.source,
        from_memory=rule.from_memory,
    )


class MappingTable(BaseModel):
    """Standard and site rules; ``entries`` lists them with citations, ``digest`` is a stable
    sha256 over their content (site rules first, as they are matched)."""

    model_config = ConfigDict(frozen=True)

    rules: tuple[Rule, ...]
    entries: tuple[MappingEntry, ...]
    digest: str
    _index: dict[tuple[str, str] | None, list[Rule]] = PrivateAttr(default_factory=dict)
    _candidates: dict[tuple[str, str], list[Rule]] = PrivateAttr(default_factory=dict)

    def model_post_init(self, __context: object) -> None:
        def order(rules: list[Rule]) -> list[Rule]:
            return sorted(rules, key=lambda r: -r.specificity[1])  # stable: table order

        site = [r for r in self.rules if r.origin is RuleOrigin.site]
        std = [r for r in self.rules if r.origin is RuleOrigin.standard]
        index: dict[tuple[str, str] | None, list[Rule]] = defaultdict(list)
        for group in (site, std):
            by_concept: dict[tuple[str, str] | None, list[Rule]] = defaultdict(list)
            for r in group:
                by_concept[None if r.concept is None else r.concept.key].append(r)
            for k, rs in by_concept.items():
                index[k].extend(order(rs))
            index[("__any__", "site" if group is site else "std")] = order(by_concept[None])
        self._index = dict(index)

    def candidates(self, concept: Code) -> list[Rule]:
        key = concept.key
        known = self._candidates.get(key)  # the table never changes: one list per concept
        if known is not None:
            return known
        index = self._index
        site_named = [r for r in index.get(key, []) if r.origin is RuleOrigin.site]
        std_named = [r for r in index.get(key, []) if r.origin is RuleOrigin.standard]
        found = (
            site_named
            + index.get(("__any__", "site"), [])
            + std_named
            + index.get(("__any__", "std"), [])
        )
        if len(self._candidates) < 4096:
            self._candidates[key] = found
        return found

    def match(self, obs: Observation) -> Rule | None:
        for rule in self.candidates(obs.concept):
            if rule.matches(obs):
                return rule
        return None


def make_table(rules: Sequence[Rule]) -> MappingTable:
    entries = tuple(_entry(r) for r in rules)
    payload = json.dumps([e.model_dump(mode="json") for e in entries], sort_keys=True)
    digest = hashlib.sha256(payload.encode("utf-8")).hexdigest()
    return MappingTable(rules=tuple(rules), entries=entries, digest=digest)


def load_mapping_table(site_files: Sequence[Path] = ()) -> MappingTable:
    """Standard tables plus the rules of the given site TOML files (site rules win).

    Raises :class:`service.errors.UserError` for a missing, unreadable or invalid file."""
    site = load_site_files([Path(p) for p in site_files])
    return make_table([*site, *STANDARD_RULES])


# ---------------------------------------------------------------------------------------------
# Building measurements
# ---------------------------------------------------------------------------------------------


def round2(x: float) -> float:
    """Round half up to 2 decimals (derived values and means)."""
    return float(Decimal(repr(x)).quantize(Decimal("0.01"), rounding=ROUND_HALF_UP))


def _clean(x: float) -> float:
    """Remove float noise from unit conversion (0.82 * 100 -> 82.0)."""
    return float(f"{x:.9g}")


def _path_key(path: str) -> tuple[int, ...]:
    try:
        return tuple(int(p) for p in path.split("."))
    except ValueError:
        return (10**9,)


def _code_str(c: Code) -> str:
    return f"{c.value} {c.scheme}"


@dataclass
class _Cand:
    obs: Observation
    rule: Rule
    value: float
    doc_rank: int
    doc_index: int


@dataclass
class _Picked:
    value: float
    origin: Origin
    n: int
    detail: str
    cands: list[_Cand] = field(default_factory=list)
    inputs: list[Quantity] = field(default_factory=list)  # for derived values


@dataclass
class _State:
    docs: Sequence[SourceDocument]
    excluded: list[Exclusion] = field(default_factory=list)
    unrecognised: list[Unrecognised] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    picked: dict[Quantity, _Picked] = field(default_factory=dict)
    picked_age: _Picked | None = None

    def exclude(self, obs: Observation, quantity: Quantity | None, reason: str) -> None:
        self.excluded.append(
            Exclusion(
                path=obs.path,
                concept=obs.concept,
                measure=quantity if isinstance(quantity, Measure) else None,
                value=obs.value if obs.value is None or math.isfinite(obs.value) else None,
                unit=obs.unit.value if obs.unit is not None else None,
                reason=reason if quantity is None else f"{SPECS[quantity].label}: {reason}",
                source_uid=obs.source_uid,
            )
        )


def _recognise(state: _State, table: MappingTable) -> dict[Quantity, list[_Cand]]:
    ranks = sorted(
        range(len(state.docs)),
        key=lambda i: (state.docs[i].created, state.docs[i].sop_instance_uid, i),
    )
    rank_of = {doc_i: r for r, doc_i in enumerate(ranks)}
    cands: dict[Quantity, list[_Cand]] = defaultdict(list)
    for doc_i, doc in enumerate(state.docs):
        for obs in doc.observations:
            rule = table.match(obs)
            if obs.problem:  # a value is there but cannot be used: say why, whatever it is
                state.exclude(
                    obs, None if rule is None else parse_quantity(rule.quantity), obs.problem
                )
                continue
            if rule is None:
                state.unrecognised.append(
                    Unrecognised(
                        path=obs.path,
                        concept=obs.concept,
                        value=obs.value if obs.value is None or math.isfinite(obs.value) else None,
                        unit=obs.unit.value if obs.unit is not None else None,
                        modifiers=obs.modifiers,
                        source_uid=obs.source_uid,
                    )
                )
                continue
            q: Quantity = parse_quantity(rule.quantity)
            valsalva = any(m.value == VALSALVA for m in obs.modifiers)
            if valsalva:
                if q not in VALSALVA_VARIANT:
                    state.exclude(
                        obs,
                        q,
                        "measured during the Valsalva manoeuvre; only mitral E, A and "
                        "E/A are used under Valsalva",
                    )
                    continue
                q = VALSALVA_VARIANT[q]
            else:
                stage = obs.modifier(STAGE)
                if stage is not None:
                    state.exclude(obs, q, f"measured at stage {stage}, not at rest")
                    continue
            spec = SPECS[q]
            if obs.qualifier is not None:
                state.exclude(obs, q, f"no measured value (qualifier {obs.qualifier})")
                continue
            if obs.value is None or not math.isfinite(obs.value):
                state.exclude(obs, q, "no numeric value")
                continue
            unit = obs.unit.value if obs.unit is not None else None
            try:
                value = _clean(convert(obs.value, unit, spec.dimension, spec.unit))
            except UnitError as exc:
                state.exclude(obs, q, str(exc))
                continue
            if unit is not None and ucum(unit)[1]:
                state.notes.append(
                    f"unit '{unit}' at {obs.path} is not UCUM; read as '{ucum(unit)[0]}'"
                )
            if value < 0 and spec.magnitude:
                value = -value  # sign is the flow direction (common practice)
            if not (spec.low <= value <= spec.high):
                state.exclude(
                    obs,
                    q,
                    f"implausible value {value:g} {spec.unit} (plausible range "
                    f"{spec.low:g} to {spec.high:g} {spec.unit}, common practice)",
                )
                continue
            cands[q].append(_Cand(obs, rule, value, rank_of[doc_i], doc_i))
    return cands


def _select(state: _State, q: Quantity, cands: list[_Cand]) -> _Picked:
    label = SPECS[q].label
    # 1. the most recently created SR wins
    best_rank = max(c.doc_rank for c in cands)
    winner = next(c for c in cands if c.doc_rank == best_rank)
    win_doc = state.docs[winner.doc_index]
    for c in cands:
        if c.doc_rank != best_rank:
            state.exclude(
                c.obs,
                q,
                f"superseded by the more recently created SR {win_doc.sop_instance_uid}"
                f" (created {win_doc.created or 'unknown'})",
            )
    cands = [c for c in cands if c.doc_rank == best_rank]
    cands.sort(key=lambda c: _path_key(c.obs.path))

    # 2. one encoding (rule variant, measurement method) per quantity
    def variant(c: _Cand) -> tuple[int, int, str, str]:
        method = c.obs.modifier(METHOD)
        method_rank = "" if method is None or method == code("mod_biplane") else str(method)
        site_first = 0 if c.rule.origin is RuleOrigin.site else 1
        return (site_first, c.rule.priority, c.rule.id, method_rank)

    groups: dict[tuple[int, int, str, str], list[_Cand]] = defaultdict(list)
    for c in cands:
        groups[variant(c)].append(c)
    # site rules first, then rule priority, then biplane / unspecified method, then tree order
    keys = sorted(groups, key=lambda k: (k[0], k[1], k[3] != "", _path_key(groups[k][0].obs.path)))
    chosen_key = keys[0]
    group = groups[chosen_key]
    for k in keys[1:]:
        for c in groups[k]:
            state.exclude(
                c.obs,
                q,
                f"another encoding of {label} was preferred ({group[0].rule.id} at "
                f"{group[0].obs.path})",
            )

    # 3. repeats
    flagged = [c for c in group if c.obs.modifier(SELECTION_STATUS) is not None]
    if flagged:
        if len(flagged) > 1:
            flagged.sort(key=lambda c: (SELECTION_RANK.get(c.obs.modifier(SELECTION_STATUS), 9),))
            state.notes.append(
                f"{label}: {len(flagged)} values carry Selection Status; "
                f"used the one at {flagged[0].obs.path}"
            )
        chosen = flagged[0]
        status = chosen.obs.modifier(SELECTION_STATUS)
        for c in group:
            if c is not chosen:
                state.exclude(
                    c.obs, q, f"not the selected value (Selection Status at {chosen.obs.path})"
                )
        return _Picked(
            value=chosen.value,
            origin=Origin.selected,
            n=len(group),
            detail=f"chosen by Selection Status '{status.meaning or status.value}' "
            f"from {len(group)} value(s)",
            cands=[chosen],
        )
    means = [c for c in group if c.obs.modifier(DERIVATION) == MEAN]
    if means:
        chosen = means[-1]
        if len(means) > 1:
            state.notes.append(
                f"{label}: {len(means)} values marked as means; used the last ({chosen.obs.path})"
            )
        for c in group:
            if c is not chosen:
                state.exclude(c.obs, q, f"the device's mean at {chosen.obs.path} was used")
        return _Picked(
            value=chosen.value,
            origin=Origin.device_mean,
            n=len(group),
            detail="marked as a mean by the device (Derivation = Mean)",
            cands=[chosen],
        )
    if len(group) == 1:
        return _Picked(value=group[0].value, origin=Origin.measured, n=1, detail="", cands=group)
    mean = round2(sum(c.value for c in group) / len(group))
    return _Picked(
        value=mean,
        origin=Origin.mean_of_repeats,
        n=len(group),
        detail=f"mean of {len(group)} unmarked repeats",
        cands=list(group),
    )


@dataclass(frozen=True)
class _Derivation:
    target: Quantity
    inputs: tuple[Quantity, ...]
    fn: Callable[..., float]
    formula: str


def _div(a: float, b: float) -> float:
    return a / b


M, C = Measure, Component
DERIVATIONS: tuple[_Derivation, ...] = (
    _Derivation(
        M.e_prime_average,
        (M.e_prime_septal, M.e_prime_lateral),
        lambda s, lat: (s + lat) / 2,
        "(septal e' + lateral e') / 2",
    ),
    _Derivation(M.e_a_ratio, (M.mitral_e, M.mitral_a), _div, "E / A"),
    _Derivation(M.e_e_prime_septal, (M.mitral_e, M.e_prime_septal), _div, "E / septal e'"),
    _Derivation(M.e_e_prime_lateral, (M.mitral_e, M.e_prime_lateral), _div, "E / lateral e'"),
    _Derivation(M.e_e_prime_average, (M.mitral_e, M.e_prime_average), _div, "E / average e'"),
    _Derivation(M.pv_s_d_ratio, (C.pv_s_velocity, C.pv_d_velocity), _div, "PV S / PV D"),
    _Derivation(
        M.ar_a_duration,
        (C.pv_ar_duration, C.mitral_a_duration),
        lambda ar, a: ar - a,
        "PV Ar duration - mitral A duration",
    ),
    _Derivation(
        M.e_a_ratio_valsalva,
        (M.mitral_e_valsalva, M.mitral_a_valsalva),
        _div,
        "E / A during Valsalva",
    ),
)


def _derive(state: _State) -> set[Quantity]:
    """Apply DERIVATIONS in order; returns the quantities consumed by a stored derived value."""
    consumed: set[Quantity] = set()
    for d in DERIVATIONS:
        if not all(q in state.picked for q in d.inputs):
            continue
        vals = [state.picked[q].value for q in d.inputs]
        try:
            computed = round2(d.fn(*vals))
        except (ZeroDivisionError, ArithmeticError):  # pragma: no cover - ranges exclude 0
            continue
        spec = SPECS[d.target]
        label = spec.label
        shown = ", ".join(f"{SPECS[q].label} {v:g}" for q, v in zip(d.inputs, vals, strict=True))
        if not (spec.low <= computed <= spec.high):
            state.notes.append(
                f"{label} computed as {d.formula} = {computed:g} from {shown} is outside the "
                f"plausible range {spec.low:g} to {spec.high:g}; not used"
            )
            continue
        derived = _Picked(
            value=computed,
            origin=Origin.derived,
            n=1,
            detail=f"{d.formula} = {computed:g} ({shown})",
            inputs=list(d.inputs),
        )
        reported = state.picked.get(d.target)
        if reported is not None:
            if reported.origin is Origin.derived:
                continue
            if abs(reported.value - computed) <= DISAGREEMENT_FRACTION * abs(computed):
                continue
            state.notes.append(
                f"reported {label} {reported.value:g} differs from {d.formula} = {computed:g} "
                f"by more than {DISAGREEMENT_FRACTION:.0%}; the components are used"
            )
            for c in reported.cands:
                state.exclude(
                    c.obs,
                    d.target,
                    f"reported value {reported.value:g} disagrees with its components "
                    f"({d.formula} = {computed:g}); components used",
                )
        state.picked[d.target] = derived
        consumed.update(d.inputs)
    return consumed


def _value_of(state: _State, q: Measure, p: _Picked) -> MeasureValue:
    codes: list[str] = []
    paths: list[str] = []
    uids: list[str] = []

    def collect(pk: _Picked) -> None:
        for c in pk.cands:
            codes.append(_code_str(c.obs.concept))
            paths.append(c.obs.path)
            uids.append(c.obs.source_uid)
        for q_in in pk.inputs:
            collect(state.picked[q_in])

    collect(p)
    seen: set[str] = set()
    codes_u = tuple(c for c in codes if not (c in seen or seen.add(c)))
    return MeasureValue(
        measure=q,
        value=p.value,
        unit=SPECS[q].unit,
        origin=p.origin,
        n=p.n,
        detail=p.detail,
        codes=codes_u,
        paths=tuple(paths),
        source_uids=tuple(uids),
    )


def _age(state: _State) -> MeasureValue | None:
    """Age in years, Origin.patient: Patient's Age (else Subject Age, else birth and study
    dates, as read) of the most recent SR that has one.  A Subject Age NUM that agrees (within
    a year) is listed as used; one that disagrees is excluded."""
    spec = SPECS[Measure.age]
    aged = [d for d in state.docs if d.patient_age_years is not None]
    doc = max(aged, key=lambda d: (d.created, d.sop_instance_uid)) if aged else None
    doc_age = None if doc is None else float(doc.patient_age_years)  # type: ignore[arg-type]
    if doc_age is not None and not (spec.low <= doc_age <= spec.high):
        state.notes.append(f"patient age {doc_age:g} years is implausible; not used")
        doc_age = None
    picked = state.picked_age
    if picked is not None:
        if doc_age is None or abs(picked.value - doc_age) < 1.0:
            mv = _value_of(state, Measure.age, picked)
            return mv.model_copy(
                update={"origin": Origin.patient, "detail": "Subject Age in the SR content"}
            )
        for c in picked.cands:
            state.exclude(
                c.obs,
                Measure.age,
                f"Subject Age {picked.value:g} years differs from the patient module's age "
                f"{doc_age:g} years; the patient module is used",
            )
    if doc_age is None or doc is None:
        return None
    return MeasureValue(
        measure=Measure.age,
        value=round2(doc_age),
        unit=spec.unit,
        origin=Origin.patient,
        detail="from the patient module of the SR",
        source_uids=(doc.sop_instance_uid,),
    )


def build_measurements(documents: Sequence[SourceDocument], table: MappingTable) -> Measurements:
    """Map the observations of one study's documents to canonical measures.

    ``MeasureValue.paths[i]`` lies in the SR ``MeasureValue.source_uids[i]`` (parallel tuples);
    derived values list the paths of their inputs."""
    state = _State(docs=list(documents))
    cands = _recognise(state, table)
    for q in sorted(cands, key=lambda x: list(SPECS).index(x)):
        state.picked[q] = _select(state, q, cands[q])
    consumed = _derive(state)
    # components are only used through a derived value
    for q, p in list(state.picked.items()):
        if isinstance(q, Component) and q not in consumed:
            users = [d for d in DERIVATIONS if q in d.inputs]
            needs = ", ".join(
                SPECS[i].label for d in users for i in d.inputs if i not in state.picked
            )
            for c in p.cands:
                state.exclude(
                    c.obs,
                    q,
                    "used only to derive "
                    + ", ".join(SPECS[d.target].label for d in users)
                    + (f", which also needs {needs} (not found)" if needs else ", not derived"),
                )
    values: dict[Measure, MeasureValue] = {}
    age_picked = state.picked.pop(Measure.age, None)
    state.picked_age = age_picked
    for q, p in state.picked.items():
        if isinstance(q, Measure):
            values[q] = _value_of(state, q, p)
    age = _age(state)
    if age is not None:
        values[Measure.age] = age
    ordered = {m: values[m] for m in Measure if m in values}
    return Measurements(
        values=ordered,
        excluded=tuple(state.excluded),
        unrecognised=tuple(state.unrecognised),
        notes=tuple(dict.fromkeys(state.notes)),
    )
