"""docs/conformance.md stays true to the code: every private (99DSRG) and standard code of the
result SR is listed, every SR storage class and transfer syntax the listener accepts is listed
under the name DICOM gives it (PS3.6 UID registry via pydicom's UID dictionary), and every
configuration key the document names exists."""

from __future__ import annotations

import re
import typing
from pathlib import Path

import pytest
from pydicom.uid import UID

from service.config import Config
from service.network.listener import SR_STORAGE_CLASSES, SR_TRANSFER_SYNTAXES
from service.sr import codes

DOC = Path(__file__).resolve().parents[1] / "docs" / "conformance.md"


@pytest.fixture(scope="module")
def text() -> str:
    return DOC.read_text(encoding="utf-8")


def _row(value: str, *cells: str) -> str:
    return "| `" + value + "` | " + " | ".join(c.replace("|", "\\|") for c in cells) + " |"


def test_every_private_code_is_listed_with_its_meaning(text):
    assert codes.PRIVATE, "the private scheme has codes"
    missing = [c.value for c in codes.PRIVATE if _row(c.value, c.meaning) not in text]
    assert not missing, f"private codes missing from docs/conformance.md: {missing}"
    listed = set(re.findall(r"^\| `([^`]+)` \| [^|`]+ \| [^|]+ \|$", text, flags=re.M))
    private_values = {c.value for c in codes.PRIVATE}
    assert private_values <= listed
    assert f"`{codes.PRIVATE_SCHEME}`" in text


def test_every_standard_code_is_listed(text):
    missing = [c.value for c in codes.STANDARD if _row(c.value, c.scheme, c.meaning) not in text]
    assert not missing, f"standard codes missing from docs/conformance.md: {missing}"


def test_sop_classes_and_transfer_syntaxes_as_dicom_names_them(text):
    for uid, name in SR_STORAGE_CLASSES.items():
        assert UID(uid).name == name  # PS3.6 Annex A, via pydicom's UID dictionary
        assert f"| SCP | {name} | `{uid}` |" in text
    assert UID("1.2.840.10008.5.1.4.1.1.104.1").name == "Encapsulated PDF Storage"  # PS3.6
    assert "| SCU | Encapsulated PDF Storage (summary) | `1.2.840.10008.5.1.4.1.1.104.1` |" in text
    # as SCP too, whatever the configuration: the node's own summary may come back
    assert "| SCP | Encapsulated PDF Storage (the node's own summary coming back;" in text
    assert "| SCU | Comprehensive SR Storage (result) |" in text
    assert "| SCP | Verification | `1.2.840.10008.1.1` |" in text
    for ts in SR_TRANSFER_SYNTAXES:
        assert f"| {UID(ts).name} | `{ts}` |" in text  # PS3.6 names


def test_the_query_retrieve_classes_backfill_uses_are_listed_as_dicom_names_them(text):
    from service.archive.dimse import FIND, GET, MOVE

    for uid in (FIND, GET, MOVE):
        name = UID(uid).name  # PS3.6 Annex A, via pydicom's UID dictionary
        assert name.startswith("Study Root Query/Retrieve Information Model - ")
        assert f"| SCU | {name} | `{uid}` |" in text


def _models(annotation: object) -> list[type]:
    """The pydantic models a field's annotation may hold (through dict, list, unions and
    Annotated, e.g. a destination that is a DICOM peer or a DICOMweb service)."""
    if hasattr(annotation, "model_fields"):
        return [annotation]  # type: ignore[list-item]
    out: list[type] = []
    for arg in typing.get_args(annotation):
        out += _models(arg)
    return out


def _exists(path: str) -> bool:
    models: list[type] = [Config]
    for part in path.split("."):
        if part in ("NAME", "AET", "*"):  # placeholders of a dict key
            continue
        part = part.removesuffix("[]")
        fields = [m.model_fields[part] for m in models if part in m.model_fields]
        if not fields:
            return False
        models = [m for f in fields for m in _models(f.annotation)]
    return True


def test_every_configuration_key_named_in_the_document_exists(text):
    sections = set(Config.model_fields) - {"base_dir"}
    named = {
        m
        for m in re.findall(r"`([a-z_]+(?:\[\])?(?:\.[A-Za-z_*]+(?:\[\])?)+)`", text)
        if m.split(".")[0].removesuffix("[]") in sections
    }
    assert len(named) > 30
    wrong = sorted(n for n in named if not _exists(n))
    assert not wrong, f"docs/conformance.md names keys that do not exist: {wrong}"


def test_implementation_identifiers_are_the_codes(text):
    # PS3.7 D.3.3.2: what the node announces in its association requests and answers
    from pynetdicom import PYNETDICOM_IMPLEMENTATION_UID, PYNETDICOM_IMPLEMENTATION_VERSION

    from service.network.store_scu import (
        IMPLEMENTATION_CLASS_UID,
        IMPLEMENTATION_VERSION_NAME,
    )

    assert f"| Implementation Class UID, as SCU | `{IMPLEMENTATION_CLASS_UID}`" in text
    assert f"| Implementation Version Name, as SCU | `{IMPLEMENTATION_VERSION_NAME}` |" in text
    assert f"| Implementation Class UID, as SCP | `{PYNETDICOM_IMPLEMENTATION_UID}`" in text
    assert (
        f"| Implementation Version Name, as SCP | `{PYNETDICOM_IMPLEMENTATION_VERSION}` |" in text
    )
