"""Mapping rules: (concept code + modifier conditions) -> canonical quantity."""

from __future__ import annotations

from enum import StrEnum

from pydantic import BaseModel, ConfigDict

from service.model import Code, Observation

#: named modifier concepts usable in conditions (PS3.16 via pydicom; Stage from memory)
MODIFIER_NAMES: dict[str, tuple[Code, ...]] = {
    "finding_site": (Code(value="363698007", scheme="SCT", meaning="Finding Site"),),
    "image_mode": (Code(value="399264008", scheme="SCT", meaning="Image Mode"),),
    "cardiac_phase": (Code(value="272518008", scheme="SCT", meaning="Cardiac Cycle Point"),),
    "flow_direction": (Code(value="260674002", scheme="SCT", meaning="Flow Direction"),),
    "measurement_method": (Code(value="370129005", scheme="SCT", meaning="Measurement Method"),),
    "topographical_modifier": (
        Code(value="106233006", scheme="SCT", meaning="Topographical Modifier"),
    ),
    "measured_property": (Code(value="125307", scheme="DCM", meaning="Measured Property"),),
    "measurement_type": (Code(value="125306", scheme="DCM", meaning="Measurement Type"),),
    "derivation": (Code(value="121401", scheme="DCM", meaning="Derivation"),),
    "selection_status": (Code(value="121404", scheme="DCM", meaning="Selection Status"),),
    # (18139-6, LN, "Stage"): from memory (TID 5202 row 7); absent from pydicom's dictionary
    "stage": (Code(value="18139-6", scheme="LN", meaning="Stage"),),
}


class RuleOrigin(StrEnum):
    standard = "standard"
    site = "site"


class Condition(BaseModel):
    """The modifier ``names`` must (or, when ``negate``, must not) have one of ``values``.
    With ``allow_absent`` a missing modifier also satisfies a positive condition."""

    model_config = ConfigDict(frozen=True)

    key: str  # alias from MODIFIER_NAMES or "VALUE SCHEME"
    names: tuple[Code, ...]
    values: tuple[Code, ...]
    allow_absent: bool = False
    negate: bool = False

    def holds(self, obs: Observation) -> bool:
        found: Code | None = None
        for n in self.names:
            found = obs.modifier(n)
            if found is not None:
                break
        if self.negate:
            return found is None or found not in self.values
        if found is None:
            return self.allow_absent
        return found in self.values

    def describe(self) -> str:
        vals = [f"{v.value} {v.scheme}" for v in self.values]
        if self.allow_absent:
            vals.append("absent")
        op = "not in" if self.negate else "in"
        return f"{self.key} {op} [{', '.join(vals)}]"


class Rule(BaseModel):
    """One mapping rule.  ``concept`` None matches any concept (TID 5302 items whose row-1
    code is private and whose meaning is carried by Measured Property and friends)."""

    model_config = ConfigDict(frozen=True)

    id: str
    concept: Code | None
    quantity: str  # Measure or Component name
    conditions: tuple[Condition, ...] = ()
    origin: RuleOrigin = RuleOrigin.standard
    priority: int = 0  # lower wins when several encodings of one quantity are present
    source: str = ""  # citation
    from_memory: bool = False

    def matches(self, obs: Observation) -> bool:
        if self.concept is not None and obs.concept != self.concept:
            return False
        return all(c.holds(obs) for c in self.conditions)

    @property
    def specificity(self) -> tuple[int, int]:
        return (1 if self.concept is not None else 0, len(self.conditions))

    def describe(self) -> str:
        concept = "any concept" if self.concept is None else f"{self.concept}"
        conds = "; ".join(c.describe() for c in self.conditions)
        return f"{concept}{' where ' + conds if conds else ''} -> {self.quantity}"
