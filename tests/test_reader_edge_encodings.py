"""Encodings the reader meets in real archives, each compared with pydicom and DCMTK on the
same bytes: a private sequence relayed as UN of undefined length, big-endian SRs, invalid
Value Types, several or disagreeing numeric values, and control characters in source text."""

from __future__ import annotations

import io
import os
import shutil
import struct
import subprocess
import sys
from pathlib import Path

import pydicom
import pytest
from netutil import echo_sr
from pydicom.filereader import data_element_generator

from service.errors import RejectedInput
from service.model import Code, Measure
from service.pipeline import GradeOptions, grade_study
from service.sr.echo_builder import EchoItem, build_echo_sr, code_item, code_seq, num_item
from service.sr.read import file_body_start, load_path, read_document
from service.vocabulary.mapper import build_measurements, load_mapping_table

DCMDUMP = "/usr/bin/dcmdump"  # DCMTK (Debian dcmtk)
TIMEOUT = 60
TABLE = load_mapping_table(())
EXPLICIT_BE = "1.2.840.10008.1.2.2"  # PS3.5 A.3 Explicit VR Big Endian (retired)


def _tool(name: str) -> str:
    found = shutil.which(name) or shutil.which(name, path=str(Path(sys.executable).parent))
    if found and os.access(found, os.X_OK):
        return found
    if os.environ.get("CI"):
        pytest.fail(f"{name} not found (installed by the README's test command)")
    pytest.skip(f"{name} not found")


def dcmdump(path: Path) -> subprocess.CompletedProcess:
    return subprocess.run(
        [_tool(DCMDUMP), "+L", str(path)], capture_output=True, text=True, timeout=TIMEOUT
    )


def dciodvfy_errors(path: Path) -> list[str]:
    proc = subprocess.run(
        [_tool("dciodvfy"), str(path)], capture_output=True, text=True, timeout=TIMEOUT
    )
    return [x for x in (proc.stderr + proc.stdout).splitlines() if x.startswith("Error")]


# -- a private sequence relayed as UN of undefined length (PS3.5 6.2.2) ---------------------


def _implicit_item(elements: list[tuple[int, bytes]]) -> bytes:
    """An undefined-length item in implicit VR little endian (PS3.5 7.5, A.1)."""
    body = b"".join(struct.pack("<HHI", t >> 16, t & 0xFFFF, len(v)) + v for t, v in elements)
    return (
        struct.pack("<HHI", 0xFFFE, 0xE000, 0xFFFFFFFF)
        + body
        + struct.pack("<HHI", 0xFFFE, 0xE00D, 0)
    )


def _with_un_sequence(tmp_path: Path) -> Path:
    """An echo SR (explicit VR little endian) with a private sequence (0009,1010) encoded as
    UN of undefined length, its content in implicit VR little endian, as a system that did
    not know the private VR relays it (PS3.5 6.2.2)."""
    ds = echo_sr("un-sequence")
    plain = tmp_path / "plain.dcm"
    ds.save_as(plain, enforce_file_format=True)
    data = plain.read_bytes()
    start = file_body_start(data)
    assert start is not None
    # insert the private block before the first element of group 0010 (elements in tag order)
    offset = None
    for elem in data_element_generator(io.BytesIO(data[start:]), False, True):
        if elem.tag.group > 0x0009:
            header = 12 if elem.VR in ("OB", "OW", "SQ", "UN", "UT", "UC", "UR") else 8
            offset = start + elem.value_tell - header
            break
    assert offset is not None
    creator = struct.pack("<HH2sH", 0x0009, 0x0010, b"LO", 8) + b"HVCC ECH"
    item = _implicit_item([(0x00091020, b"VENDOR01"), (0x00091021, b"12")])
    un = (
        struct.pack("<HH2s2xI", 0x0009, 0x1010, b"UN", 0xFFFFFFFF)
        + item
        + struct.pack("<HHI", 0xFFFE, 0xE0DD, 0)
    )
    out = tmp_path / "un-sequence.dcm"
    out.write_bytes(data[:offset] + creator + un + data[offset:])
    return out


def test_private_sequence_as_undefined_length_un_is_read(tmp_path: Path):
    path = _with_un_sequence(tmp_path)
    # pydicom reads it and finds the private item's elements
    ds = pydicom.dcmread(path)
    private = ds[0x00091010]
    assert private.VR in ("UN", "SQ")
    assert ds.StudyInstanceUID and "ContentSequence" in ds
    # DCMTK shows it, and dicom3tools finds no error in it
    dumped = dcmdump(path)
    assert dumped.returncode == 0 and "(0009,1010)" in dumped.stdout
    assert dciodvfy_errors(path) == []
    # the reader reads it, and grades it like the same SR without the private block
    loaded = load_path(path)
    outcome = grade_study([loaded], GradeOptions())
    plain = grade_study([echo_sr("un-sequence")], GradeOptions())
    assert outcome.status.value == "graded"
    assert outcome.assessment.grade == plain.assessment.grade


def test_listener_check_accepts_the_undefined_length_un_sequence(tmp_path: Path):
    from service.network.listener import identifying_attributes

    data = _with_un_sequence(tmp_path).read_bytes()
    ds = pydicom.dcmread(io.BytesIO(data))
    body = data[file_body_start(data) :]
    found = identifying_attributes(body, "1.2.840.10008.1.2.1")
    assert found.StudyInstanceUID == ds.StudyInstanceUID


# -- big endian --------------------------------------------------------------------------------


def _big_endian(tmp_path: Path, name: str) -> Path:
    ds = echo_sr("big-endian")
    ds.file_meta.TransferSyntaxUID = EXPLICIT_BE
    path = tmp_path / name
    ds.save_as(path, enforce_file_format=True)  # pydicom writes the retired syntax still
    return path


def test_big_endian_sr_is_read_whole_and_a_cut_one_is_refused(tmp_path: Path):
    whole = _big_endian(tmp_path, "be.dcm")
    # DCMTK and pydicom read the same bytes as Explicit VR Big Endian
    assert "BigEndianExplicit" in dcmdump(whole).stdout
    assert str(pydicom.dcmread(whole).file_meta.TransferSyntaxUID) == EXPLICIT_BE
    expected = grade_study([echo_sr("big-endian")], GradeOptions()).assessment.grade
    assert grade_study([load_path(whole)], GradeOptions()).assessment.grade == expected
    data = whole.read_bytes()
    cut = tmp_path / "be-cut.dcm"
    cut.write_bytes(data[: int(len(data) * 0.8)])
    # DCMTK sees the damage too (premature end of stream)
    assert dcmdump(cut).returncode != 0
    with pytest.raises(RejectedInput, match="unreadable or truncated"):
        load_path(cut)


# -- what a NUM holds --------------------------------------------------------------------------

E = Code(value="80070-6", scheme="LN", meaning="Mitral valve E-wave Vmax")  # CID 12300


def _measures(*items):
    doc = read_document(build_echo_sr((), raw_content=list(items)))
    return build_measurements([doc], TABLE)


def test_num_with_an_invalid_value_type_is_excluded_with_the_reason():
    bad = num_item(E, 80, "cm/s")
    bad.ValueType = "num"  # PS3.3 C.17.3.2.1 defined terms are upper case
    m = _measures(bad, num_item(E, 90, "cm/s"))
    [excluded] = m.excluded
    assert "invalid Value Type 'num'" in excluded.reason
    assert m.get(Measure.mitral_e) == 90  # the valid one only
    unknown = num_item(Code(value="HV-X", scheme="99HVCC", meaning="x"), 3, "cm")
    unknown.ValueType = "NUMBER"
    m = _measures(unknown)
    assert [e.reason for e in m.excluded if "NUMBER" in e.reason]  # nothing dropped


def test_several_numeric_values_are_excluded_with_the_reason():
    item = num_item(E, 80, "cm/s")
    item.MeasuredValueSequence[0].NumericValue = ["80", "120"]  # VM 2: PS3.3 C.18.1 says 1
    m = _measures(item)
    assert Measure.mitral_e not in m.values
    [excluded] = m.excluded
    assert "2 values in Numeric Value (80, 120)" in excluded.reason


def test_floating_point_value_disagreeing_with_numeric_value_is_excluded():
    agree = num_item(E, 80.1, "cm/s")
    agree.MeasuredValueSequence[0].FloatingPointValue = 80.1234  # more precision: agrees
    assert _measures(agree).get(Measure.mitral_e) == 80.1234
    disagree = num_item(E, 80, "cm/s")
    disagree.MeasuredValueSequence[0].FloatingPointValue = 120.0
    m = _measures(disagree)
    assert Measure.mitral_e not in m.values
    [excluded] = m.excluded
    assert "Floating Point Value 120 and Numeric Value 80 disagree" in excluded.reason


# -- control characters copied from a source into the result ---------------------------------


def text_item(name: Code, value: str) -> pydicom.Dataset:
    ds = pydicom.Dataset()
    ds.RelationshipType = "CONTAINS"
    ds.ValueType = "TEXT"
    ds.ConceptNameCodeSequence = code_seq(name)
    ds.TextValue = value
    return ds


def test_control_characters_in_source_text_never_reach_the_result(tmp_path: Path):
    from service.sr.encode import file_bytes

    # the standard code of mitral E with control characters in its meaning, and a value out of
    # range: excluded, so the result names it (with its meaning) among the excluded items
    odd = Code(value="80070-6", scheme="LN", meaning="Odd\x07 mitral E\x1b")
    rhythm_text = text_item(
        Code(value="121106", scheme="DCM", meaning="Comment"), "sinus\x01 rhythm\x0b"
    )
    items = [
        EchoItem(measure=Measure(k), value=v)
        for k, v in {
            "mitral_e": 80.0,
            "mitral_a": 60.0,
            "e_prime_septal": 6.0,
            "e_prime_lateral": 8.0,
            "tr_peak_velocity": 3.0,
            "lavi": 40.0,
            "lvef": 60.0,
        }.items()
    ]
    source = build_echo_sr(
        items, raw_content=[num_item(odd, 900.0, "cm/s"), rhythm_text, code_item(odd, odd)]
    )
    source_path = tmp_path / "source.dcm"
    source.save_as(source_path, enforce_file_format=True)
    outcome = grade_study([load_path(source_path)], GradeOptions())
    assert outcome.result is not None
    path = tmp_path / "result.dcm"
    path.write_bytes(file_bytes(outcome.result))
    texts = [
        (e.VR, str(e.value))
        for e in pydicom.dcmread(path).iterall()
        if e.VR in ("SH", "LO", "ST", "LT", "UT") and e.value
    ]
    assert any("Odd" in t and "mitral E" in t for _, t in texts)  # the text is copied ...
    allowed = {"ST": "\t\n\f\r", "LT": "\t\n\f\r", "UT": "\t\n\f\r"}
    for vr, text in texts:  # ... without the control characters its VR does not allow
        assert not [c for c in text if ord(c) < 32 and c not in allowed.get(vr, "")], text
    # dicom3tools: no error on the result (PS3.5 6.2: characters each text VR allows)
    assert dciodvfy_errors(path) == []
