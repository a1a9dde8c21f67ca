"""``grade``, ``inspect`` and ``codes`` on what hospital export folders really hold: the same
file name in every study folder, a study split over several SRs, named pipes and media
directories; options checked before any file is read; ``--compare`` in the table."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from io import BytesIO
from pathlib import Path

import pydicom
import pytest
from netutil import (
    DCMTK_REASON,
    SKIP_WITHOUT_DCMTK,
    echo_sr,
    run_storescu,
    wait_for,
)

from service.model import Measure

CLI = [sys.executable, "-m", "service.cli"]

#: the two halves of one study, as a scanner and a workstation might export them
FIRST_HALF = {"mitral_e": 80.0, "mitral_a": 60.0, "e_prime_septal": 6.0}
SECOND_HALF = {"e_prime_lateral": 8.0, "tr_peak_velocity": 3.0, "lavi": 40.0, "lvef": 60.0}


def run_cli(*args: object, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run(
        [*CLI, *map(str, args)], capture_output=True, text=True, timeout=timeout, check=False
    )


def json_rows(proc: subprocess.CompletedProcess) -> list[dict]:
    return [json.loads(line) for line in proc.stdout.splitlines()]


def _save(ds: pydicom.Dataset, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    ds.save_as(path, enforce_file_format=True)
    return path


# -- output names never collide --------------------------------------------------------------


def test_same_file_name_in_two_folders_gives_two_results(tmp_path: Path):
    a = _save(echo_sr("folder-a", patient_id="HV-A-0001"), tmp_path / "a" / "report.dcm")
    b = _save(
        echo_sr("folder-b", patient_id="HV-B-0002", values={**FIRST_HALF, **SECOND_HALF}),
        tmp_path / "b" / "report.dcm",
    )
    out = tmp_path / "out"
    proc = run_cli("grade", tmp_path / "a", tmp_path / "b", "--out", out, "--pdf", "--json")
    assert proc.returncode == 0, proc.stderr
    rows = json_rows(proc)
    assert [r["input"] for r in rows] == [str(a), str(b)]
    outputs = [Path(r["output"]) for r in rows]
    summaries = [Path(r["summary"]) for r in rows]
    assert len(set(outputs)) == 2 and len(set(summaries)) == 2  # nothing overwritten
    for row, output in zip(rows, outputs, strict=True):
        written = pydicom.dcmread(output)
        assert written.SOPInstanceUID == row["result_uid"]
        assert written.PatientID == pydicom.dcmread(row["input"]).PatientID
    # the table says where each result went
    table = run_cli("grade", tmp_path / "a", tmp_path / "b", "--out", tmp_path / "t")
    assert table.returncode == 0, table.stderr
    assert "result" in table.stdout.splitlines()[0]
    for name in ("report.result.dcm", "report.2.result.dcm"):
        assert str(tmp_path / "t" / name) in table.stdout


def test_output_mirrors_the_folders_inside_the_folder_given(tmp_path: Path):
    export = tmp_path / "export"
    _save(echo_sr("mirror-1", patient_id="HV-M-0001"), export / "p1" / "report.dcm")
    _save(echo_sr("mirror-2", patient_id="HV-M-0002"), export / "p2" / "report.dcm")
    out = tmp_path / "out"
    rows = json_rows(run_cli("grade", export, "--out", out, "--json"))
    assert [r["output"] for r in rows] == [
        str(out / "p1" / "report.result.dcm"),
        str(out / "p2" / "report.result.dcm"),
    ]


# -- one study, one result: offline as on the node --------------------------------------------


def test_study_split_over_two_srs_is_graded_once_with_the_nodes_merge(tmp_path: Path):
    from service.pipeline import GradeOptions, grade_study

    first = echo_sr("split", instance=1, content_time="101500", values=FIRST_HALF)
    second = echo_sr("split", instance=2, content_time="103000", values=SECOND_HALF)
    assert first.StudyInstanceUID == second.StudyInstanceUID
    p1 = _save(first, tmp_path / "in" / "part1.dcm")
    p2 = _save(second, tmp_path / "in" / "part2.dcm")
    proc = run_cli("grade", tmp_path / "in", "--json", "--out", tmp_path / "out")
    assert proc.returncode == 0, proc.stderr
    [row] = json_rows(proc)
    assert row["input"] == str(p1) and row["inputs"] == [str(p1), str(p2)]
    assert row["grade"] not in (None, "not-gradable")  # the merge made it gradable
    # the node grades a study with service.pipeline.grade_study on all of its objects
    merged = grade_study([first, second], GradeOptions())
    assert row["result_uid"] == merged.result_uid
    result = pydicom.dcmread(row["output"])
    evidence = {
        str(i.ReferencedSOPInstanceUID)
        for s in result.CurrentRequestedProcedureEvidenceSequence
        for r in s.ReferencedSeriesSequence
        for i in r.ReferencedSOPSequence
    }
    assert evidence == {first.SOPInstanceUID, second.SOPInstanceUID}
    # --per-file keeps grading each file alone
    alone = json_rows(run_cli("grade", tmp_path / "in", "--json", "--per-file"))
    assert [r["input"] for r in alone] == [str(p1), str(p2)]
    assert all(r["inputs"] == [r["input"]] for r in alone)
    assert row["result_uid"] not in {r["result_uid"] for r in alone}


def test_a_split_study_is_shown_by_its_first_file_in_path_order(tmp_path: Path):
    # the demo's naming: "two-reports.dcm" and "two-reports-part2.dcm".  A plain string sort
    # puts "-" (0x2D) before "." (0x2E), i.e. part 2 first; a person lists the shorter name first
    first = echo_sr("first-file", instance=1, content_time="101500", values=FIRST_HALF)
    second = echo_sr("first-file", instance=2, content_time="103000", values=SECOND_HALF)
    p1 = _save(first, tmp_path / "in" / "study.dcm")
    p2 = _save(second, tmp_path / "in" / "study-part2.dcm")
    assert sorted([str(p1), str(p2)]) == [str(p2), str(p1)]
    out = tmp_path / "out"
    for given in ([tmp_path / "in"], [p2, p1], [p1, p2]):
        [row] = json_rows(run_cli("grade", *given, "--json", "--out", out))
        assert row["input"] == str(p1), given
        assert row["inputs"] == [str(p1), str(p2)], given
        assert row["output"] == str(out / "study.result.dcm"), given
    table = run_cli("grade", p2, p1, "--out", tmp_path / "t")
    assert table.returncode == 0, table.stderr
    [line] = [ln for ln in table.stdout.splitlines() if "more of the study" in ln]
    assert line.startswith(f"{p1} (+1 more of the study)"), line
    assert str(tmp_path / "t" / "study.result.dcm") in line


# -- options are checked before any file is read ---------------------------------------------


@pytest.mark.parametrize(
    ("option", "value", "allowed"),
    [
        ("--lvef-reduced-below", "200", "less than 100"),
        ("--lvef-reduced-below", "-5", "greater than 0"),
        ("--uid-root", "1.2.abc", "dotted digits"),
    ],
)
def test_bad_grading_option_is_one_usage_error_before_any_file(
    tmp_path: Path, option: str, value: str, allowed: str
):
    from service.config import config_from_dict
    from service.errors import UserError

    source = _save(echo_sr("options"), tmp_path / "in" / "x.dcm")
    out = tmp_path / "out"
    proc = run_cli("grade", source, "--out", out, f"{option}={value}")
    assert proc.returncode == 2
    assert proc.stdout == ""
    [line] = proc.stderr.splitlines()
    assert option in line and value in line and allowed in line
    assert not out.exists()  # nothing written
    # the configuration file refuses the same value (one validation)
    key = option.removeprefix("--").replace("-", "_")
    typed = float(value) if key == "lvef_reduced_below" else value
    with pytest.raises(UserError, match=f"grading.{key}"):
        config_from_dict({"grading": {key: typed}})


def test_codes_with_an_unknown_measure_says_so_and_lists_the_known_ones():
    proc = run_cli("codes", "--measure", "foo")
    assert proc.returncode == 2
    assert "foo" in proc.stderr and "unknown measure" in proc.stderr
    assert all(m.value in proc.stderr for m in Measure)
    assert run_cli("codes", "--measure", "mitral_e").returncode == 0


def test_inspect_a_folder_inspects_each_file(tmp_path: Path):
    _save(echo_sr("inspect-1"), tmp_path / "in" / "a.dcm")
    _save(echo_sr("inspect-2"), tmp_path / "in" / "sub" / "b.dcm")
    proc = run_cli("inspect", tmp_path / "in", "--json")
    assert proc.returncode == 0, proc.stderr
    rows = json_rows(proc)
    assert [Path(r["input"]).name for r in rows] == ["a.dcm", "b.dcm"]
    assert all("mitral_e" in r["recognised"] for r in rows)


# -- what export folders hold ----------------------------------------------------------------


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes need POSIX")
def test_named_pipe_is_skipped_with_a_line_and_does_not_block(tmp_path: Path):
    folder = tmp_path / "in"
    source = _save(echo_sr("fifo"), folder / "a.dcm")
    os.mkfifo(folder / "b.pipe")  # nobody ever writes to it: reading it would block
    # bounded: a hang fails the test through the timeout instead of stalling the suite
    proc = run_cli("grade", folder, "--json", timeout=60)
    assert proc.returncode == 0, proc.stderr
    rows = json_rows(proc)
    assert [(Path(r["input"]).name, r["status"]) for r in rows] == [
        ("a.dcm", "graded"),
        ("b.pipe", "skipped"),
    ]
    assert "named pipe" in rows[1]["reason"] and "not a regular file" in rows[1]["reason"]
    assert rows[0]["inputs"] == [str(source)]
    inspected = run_cli("inspect", folder, timeout=60)
    assert inspected.returncode == 0 and "named pipe" in inspected.stdout


def _media_folder(tmp_path: Path) -> Path:
    """A DICOM File-set (PS3.10 section 8) written by pydicom's FileSet: DICOMDIR plus the
    referenced files in its own folder layout."""
    from pydicom.fileset import FileSet

    fs = FileSet()
    for seed in ("media-1", "media-2"):
        fs.add(echo_sr(seed, patient_id=f"HV-{seed}"))
    media = tmp_path / "media"
    fs.write(media)
    return media


def test_dicomdir_is_skipped_and_the_files_it_references_are_graded(tmp_path: Path):
    media = _media_folder(tmp_path)
    dicomdir = media / "DICOMDIR"
    # PS3.10 8.6 / PS3.4 Annex F: Media Storage Directory Storage
    assert pydicom.dcmread(dicomdir).file_meta.MediaStorageSOPClassUID == "1.2.840.10008.1.3.10"
    for target in (media, dicomdir):  # the folder, or the DICOMDIR alone
        proc = run_cli("grade", target, "--json")
        assert proc.returncode == 0, proc.stderr
        rows = json_rows(proc)
        statuses = sorted((Path(r["input"]).name == "DICOMDIR", r["status"]) for r in rows)
        assert statuses == [(False, "graded"), (False, "graded"), (True, "skipped")], rows
        [directory] = [r for r in rows if Path(r["input"]).name == "DICOMDIR"]
        assert "media directory" in directory["reason"]


# -- --compare shows its answer in the table -------------------------------------------------


def test_compare_table_has_a_column_and_a_plain_words_line_per_disagreement(tmp_path: Path):
    demo = tmp_path / "demo"
    assert run_cli("demo-data", demo).returncode == 0
    # the demo's indeterminate case: ASE/EACVI 2016 indeterminate, ASE 2025 normal
    # (service/demo/scenario.py; published cut-offs in service/grading/thresholds_*.py)
    proc = run_cli("grade", demo / "indeterminate.dcm", demo / "normal.dcm", "--compare")
    assert proc.returncode == 0, proc.stderr
    lines = proc.stdout.splitlines()
    assert "other guidelines" in lines[0]
    row = next(x for x in lines if "indeterminate.dcm" in x)
    assert "ase-2025: normal" in row
    assert any(x.startswith("Guidelines differ for") and "indeterminate.dcm" in x for x in lines)
    assert not any(x.startswith("Guidelines differ for") and "normal.dcm" in x for x in lines)
    plain = run_cli("grade", demo / "indeterminate.dcm")
    assert "other guidelines" not in plain.stdout and "Guidelines differ" not in plain.stdout


@pytest.mark.network
@pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)
def test_split_study_gives_the_same_result_offline_and_on_the_node(tmp_path: Path, loopback_nodes):
    first = echo_sr("split-node", instance=1, content_time="101500", values=FIRST_HALF)
    second = echo_sr("split-node", instance=2, content_time="103000", values=SECOND_HALF)
    files = [_save(first, tmp_path / "in" / "a.dcm"), _save(second, tmp_path / "in" / "b.dcm")]
    [row] = json_rows(run_cli("grade", tmp_path / "in", "--json"))
    node = loopback_nodes.start({"http": {"port": 0}}, settle=2.0)
    # DCMTK storescu, -R: propose the files' own SOP classes
    assert run_storescu(files, node.port).returncode == 0
    study = str(first.StudyInstanceUID)

    def merged_and_done():
        row = node.journal.study(study)
        if row is None or row["state"] not in ("delivered", "failed") or not row["result_uid"]:
            return None
        result = node.journal.result(row["result_uid"])
        return row if result and len(result["sources"]) == 2 else None

    done = wait_for(merged_and_done, 60)
    # one study, one result: the same instance offline and on the node
    assert done["state"] == "delivered"
    assert done["result_uid"] == row["result_uid"]


def test_the_order_sources_are_given_in_does_not_change_the_result():
    # service.pipeline.study_order: content date/time, then SOP Instance UID, undated last
    import itertools
    from datetime import datetime

    from service.pipeline import GradeOptions, grade_study, study_order
    from service.sr.encode import file_bytes

    a = echo_sr("any-order", instance=1, content_time="101500", values=FIRST_HALF)
    b = echo_sr("any-order", instance=2, content_time="103000", values=SECOND_HALF)
    c = echo_sr("any-order", instance=3, content_time="103000", values={"ivrt": 80.0})
    undated = echo_sr("any-order", instance=4, values={"deceleration_time": 190.0})
    for keyword in ("ContentDate", "ContentTime", "InstanceCreationDate", "InstanceCreationTime"):
        if keyword in undated:
            delattr(undated, keyword)
    tied = sorted([b, c], key=lambda ds: str(ds.SOPInstanceUID))
    assert study_order([undated, c, b, a]) == [a, *tied, undated]
    when = datetime(2026, 1, 2, 3, 4, 5)
    made = {
        file_bytes(grade_study(list(given), GradeOptions(), content_datetime=when).result)
        for given in itertools.permutations([a, b, c, undated])
    }
    assert len(made) == 1


def test_files_set_aside_are_listed_in_the_order_given(tmp_path: Path):
    # the study is graded in its own order (the later SR first here would be wrong: b.dcm was
    # made first), but the rows about files keep the order the files were given in
    from netutil import simple_sr

    study = "1.2.826.0.1.3680043.10.1.77"
    later = simple_sr(study, sop_uid="1.2.826.0.1.3680043.10.1.77.2", created="20260101130000")
    earlier = simple_sr(study, sop_uid="1.2.826.0.1.3680043.10.1.77.1", created="20260101120000")
    a = _save(later, tmp_path / "in" / "a.dcm")
    b = _save(earlier, tmp_path / "in" / "b.dcm")
    rows = json_rows(run_cli("grade", tmp_path / "in", "--json"))
    assert [r["input"] for r in rows] == [str(a), str(b)]
    assert all(r["status"] == "rejected" for r in rows)


#: what must differ between two results of the same study made at different moments: the
#: date and time each was made (SOP Common: Instance Creation Date/Time, PS3.3 C.12.1; SR
#: Document General: Content Date/Time, PS3.3 C.17.2).  Nothing else may.
MADE_AT = (0x00080012, 0x00080013, 0x00080023, 0x00080033)


def _content(ds: pydicom.Dataset) -> pydicom.Dataset:
    """The result without the moment it was made, decoded (file meta included)."""
    ds = pydicom.dcmread(ds) if isinstance(ds, str | Path) else ds
    for tag in MADE_AT:
        if tag in ds:
            del ds[tag]
    for elem in ds.iterall():  # decode every element, nested ones too
        _ = elem.value
    return ds


@pytest.mark.network
@pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)
def test_a_study_gives_the_same_result_content_offline_and_on_the_node(
    tmp_path: Path, loopback_nodes
):
    # two SRs of one study whose header details differ (a workstation's later SR carries
    # another Study Description): whichever source comes first is the one the result copies
    # its study module from, and the evidence list follows the same order.  The files' path
    # order (a.dcm: the later SR) is the reverse of the order they are sent in and of when they
    # were made, so only a rule of its own orders them the same offline and on the node.
    first = echo_sr("order", instance=1, content_time="101500", values=FIRST_HALF)
    second = echo_sr("order", instance=2, content_time="103000", values=SECOND_HALF)
    first.StudyDescription = "Echocardiogram (scanner)"
    second.StudyDescription = "Echocardiogram (workstation)"
    earlier = _save(first, tmp_path / "in" / "b.dcm")
    later = _save(second, tmp_path / "in" / "a.dcm")
    [row] = json_rows(run_cli("grade", tmp_path / "in", "--json", "--out", tmp_path / "out"))
    assert row["inputs"] == [str(later), str(earlier)]  # path order
    offline = _content(row["output"])
    node = loopback_nodes.start({"http": {"port": 0}}, settle=3.0)
    assert run_storescu([earlier, later], node.port).returncode == 0  # DCMTK storescu -R
    study = str(first.StudyInstanceUID)

    def graded_from_both():
        done = node.journal.study(study)
        if done is None or not done["result_uid"]:
            return None
        result = node.journal.result(done["result_uid"])
        return result if result and len(result["sources"]) == 2 else None

    result = wait_for(graded_from_both, 60)
    online = _content(pydicom.dcmread(BytesIO(node.journal.result_data(result["result_uid"]))))
    if result["predecessors"]:
        # the node graded the first SR before the second arrived (a settle window that ran
        # out under load) and names that result as the predecessor; offline there was none
        del online.PredecessorDocumentsSequence
    # the same study module (from the earlier SR), the same evidence order, the same tree
    assert offline.StudyDescription == online.StudyDescription == "Echocardiogram (scanner)"
    evidence = [
        str(i.ReferencedSOPInstanceUID)
        for s in online.CurrentRequestedProcedureEvidenceSequence
        for r in s.ReferencedSeriesSequence
        for i in r.ReferencedSOPSequence
    ]
    assert evidence == [first.SOPInstanceUID, second.SOPInstanceUID]
    assert offline.file_meta == online.file_meta
    differing = [
        str(e.tag) for e in offline if e.tag not in online or online[e.tag].value != e.value
    ] + [str(e.tag) for e in online if e.tag not in offline]
    assert not differing, differing
