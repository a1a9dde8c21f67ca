"""Deterministic UIDs and configuration digests.

Sources: PS3.5 section 6.2 (VR UI: at most 64 characters, digits and dots, no leading zero in
a component) and PS3.5 Annex B.2 (UUID-derived UIDs under 2.25); RFC 9562 (UUID version 8
and variant bits).  UID syntax also checked with pydicom's ``UID.is_valid``.
"""

from __future__ import annotations

import re
import uuid

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydicom.uid import UID

from service.errors import UserError
from service.sr.identity import config_digest, derive_uid, validate_root

UID_SYNTAX = re.compile(r"^(0|[1-9][0-9]*)(\.(0|[1-9][0-9]*))*$")  # PS3.5 section 9.1

parts_strategy = st.lists(st.text(max_size=30), min_size=1, max_size=5)


def _valid(uid: str) -> bool:
    return len(uid) <= 64 and bool(UID_SYNTAX.match(uid)) and UID(uid).is_valid


def test_default_root_is_a_uuid_derived_uid():
    uid = derive_uid("diastolic-sr", "result", "1.2.3")
    assert uid.startswith("2.25.")  # PS3.5 Annex B.2
    assert _valid(uid)
    u = uuid.UUID(int=int(uid[5:]))
    assert u.version == 8  # RFC 9562 custom UUID
    assert u.variant == uuid.RFC_4122


def test_same_parts_same_uid_and_order_matters():
    assert derive_uid("a", "b") == derive_uid("a", "b")
    assert derive_uid("a", "b") != derive_uid("b", "a")
    # boundaries between parts count
    assert derive_uid("ab", "c") != derive_uid("a", "bc")
    assert derive_uid("a", "b", root="1.2.3") == derive_uid("a", "b", root="1.2.3")
    assert derive_uid("a", "b", root="1.2.3") != derive_uid("a", "b", root="1.2.4")
    assert derive_uid("a", "b", root="1.2.3") != derive_uid("a", "b")


@settings(max_examples=200, deadline=None, derandomize=True)
@given(parts_strategy, parts_strategy)
def test_property_distinct_parts_distinct_uids(p, q):
    a, b = derive_uid(*p), derive_uid(*q)
    assert _valid(a) and _valid(b)
    assert (a == b) == (p == q)


@settings(max_examples=100, deadline=None, derandomize=True)
@given(
    parts_strategy,
    st.lists(st.integers(min_value=0, max_value=99999), min_size=2, max_size=8).map(
        lambda xs: ".".join(str(x) for x in xs)
    ),
)
def test_property_custom_root_fits_64(parts, root):
    if len(root) > 43:
        with pytest.raises(UserError):
            derive_uid(*parts, root=root)
        return
    uid = derive_uid(*parts, root=root)
    assert uid.startswith(root + ".")
    assert _valid(uid)


def test_long_root_fills_to_64_at_most():
    root = "1.2.826.0.1.3680043.10.99999.123456"
    uid = derive_uid("x", root=root)
    assert len(uid) <= 64 and _valid(uid)


@pytest.mark.parametrize(
    "root", ["", "1..2", "1.02", "a.b", "1.2.", ".1.2", "1.2.3 ", "1." + "2" * 50]
)
def test_bad_root_is_a_clear_error(root):
    with pytest.raises(UserError, match="UID root"):
        derive_uid("x", root=root)
    with pytest.raises(UserError):
        validate_root(root)


def test_bad_parts_are_clear_errors():
    with pytest.raises(UserError, match="at least one part"):
        derive_uid()
    with pytest.raises(UserError, match="must be strings"):
        derive_uid("a", 3)  # type: ignore[arg-type]


def test_config_digest_stable_and_key_order_free():
    a = {"guideline": "ase-eacvi-2016", "options": {"compare": False, "borderline": 0.1}}
    b = {"options": {"borderline": 0.1, "compare": False}, "guideline": "ase-eacvi-2016"}
    assert config_digest(a) == config_digest(b)
    assert re.fullmatch(r"[0-9a-f]{64}", config_digest(a))
    assert config_digest(a) != config_digest({**a, "guideline": "ase-2025"})
    # a known value pins the serialisation (sha256 of '{"a":1}', computed with hashlib)
    assert config_digest({"a": 1}) == (
        "015abd7f5cc57a2dd94b7590f04ad8084273905ee33ec5cebeae62276a97f862"
    )


def test_config_digest_rejects_non_json():
    with pytest.raises(UserError, match="cannot be digested"):
        config_digest({"x": object()})


def test_result_uid_follows_sources_rules_settings_and_document_layout(monkeypatch):
    # a re-sent study under the same rules, settings and layout: the same result instance;
    # a result laid out differently (service.sr.write.DOCUMENT_LAYOUT) never reuses its UID
    import service.sr.write as write
    from service.model import SourceDocument
    from service.pipeline import GradeOptions, result_identity

    doc = SourceDocument(
        sop_instance_uid="2.25.1",
        sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
        study_instance_uid="2.25.2",
        series_instance_uid="2.25.3",
    )
    first = result_identity([doc], GradeOptions(), "table-digest", "ase-eacvi-2016/1")
    assert result_identity([doc], GradeOptions(), "table-digest", "ase-eacvi-2016/1") == first
    assert result_identity([doc], GradeOptions(), "table-digest", "ase-2025/1")[0] != first[0]
    monkeypatch.setattr(write, "DOCUMENT_LAYOUT", write.DOCUMENT_LAYOUT + "-other")
    again = result_identity([doc], GradeOptions(), "table-digest", "ase-eacvi-2016/1")
    assert again[0] != first[0]
    assert again[1] == first[1]  # the series stays the study's results series
