"""``inspect`` and ``codes``: an administrator teaches diastolic-sr a scanner's private code."""

from __future__ import annotations

import json
import tomllib
from pathlib import Path

import pytest

from service.cli import main
from service.demo.scenario import CASES, case_datasets

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture()
def private_lavi_sr(tmp_path: Path) -> Path:
    # The grade-2 demo case codes LAVI with an invented private code (99HVCC HV-LAVI).
    case = next(c for c in CASES if c.key == "grade-2")
    path = tmp_path / "grade-2.dcm"
    case_datasets(case)[0].save_as(path, enforce_file_format=True)
    return path


def test_inspect_suggests_a_rule_that_once_added_is_used(private_lavi_sr, tmp_path, capsys):
    assert main(["inspect", "--json", str(private_lavi_sr)]) == 0
    report = json.loads(capsys.readouterr().out)
    assert "lavi" not in report["recognised"]
    unrec = [u for u in report["unrecognised"] if u["concept"]["value"] == "HV-LAVI"]
    assert len(unrec) == 1
    rule = unrec[0]["suggested_rule"]
    parsed = tomllib.loads(rule)  # ready to paste: valid TOML as printed
    assert parsed["rule"][0]["code"] == "HV-LAVI" and parsed["rule"][0]["scheme"] == "99HVCC"

    # Before: graded without LAVI (criterion unavailable).
    assert main(["grade", "--json", str(private_lavi_sr)]) == 0
    before = json.loads(capsys.readouterr().out)
    assert "lavi" not in before["measurements"]

    # The administrator sets the measure and adds the file.
    site = tmp_path / "site.toml"
    site.write_text(rule.replace('measure = "?"', 'measure = "lavi"'))
    assert main(["grade", "--json", "--mapping", str(site), str(private_lavi_sr)]) == 0
    after = json.loads(capsys.readouterr().out)
    assert after["measurements"]["lavi"]["value"] == 41
    lavi = [c for c in after["criteria"] if c["measure"] == "lavi"]
    assert lavi and all(c["verdict"] == "met" for c in lavi)  # 41 > 34 (Nagueh 2016 Fig 8A)
    assert after["result_uid"] != before["result_uid"]  # mapping changed: a new result


def test_suggested_rule_with_measure_unset_is_refused_clearly(private_lavi_sr, tmp_path, capsys):
    main(["inspect", "--json", str(private_lavi_sr)])
    rule = json.loads(capsys.readouterr().out)["unrecognised"][0]["suggested_rule"]
    site = tmp_path / "site.toml"
    site.write_text(rule)
    assert main(["grade", "--mapping", str(site), str(private_lavi_sr)]) == 2
    err = capsys.readouterr().err
    assert "measure" in err and "'?'" in err and "lavi" in err  # names key, value, allowed


def test_inspect_text_lists_recognised_excluded_and_unrecognised(private_lavi_sr, capsys):
    assert main(["inspect", str(private_lavi_sr)]) == 0
    out = capsys.readouterr().out
    assert "Recognised (" in out and "Excluded (" in out and "Not recognised (1)" in out
    assert "HV-LAVI" in out and "[[rule]]" in out


def test_inspect_rejects_a_non_dicom_file(tmp_path, capsys):
    junk = tmp_path / "x.txt"
    junk.write_text("hello")
    assert main(["inspect", str(junk)]) == 1
    assert "not a DICOM file" in capsys.readouterr().out


def test_codes_lists_standard_rules_with_sources_and_site_rules_first(capsys):
    site = ROOT / "config" / "mappings" / "example-site.toml"
    assert main(["codes", "--json", "--mapping", str(site)]) == 0
    rows = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    origins = [r["origin"] for r in rows]
    assert origins.index("standard") > origins.index("site")
    assert "standard" not in origins[: origins.count("site")]  # site rules come first
    standard = [r for r in rows if r["origin"] == "standard"]
    assert all(r["source"] for r in standard)  # every standard code names its source
    e_wave = [r for r in standard if r["concept"].startswith("80070-6 LN")]
    assert e_wave and e_wave[0]["measure"] == "mitral_e"  # PS3.16 CID 12300


def test_bad_mapping_file_gives_one_clear_line(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text("[[rule]]\ncode = 'X'\n")
    assert main(["codes", "--mapping", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "bad.toml" in err and "Traceback" not in err
