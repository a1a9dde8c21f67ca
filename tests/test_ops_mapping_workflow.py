"""The administrator's workflow on a running node: a scanner codes LAVI with a private code;
``inspect`` prints a ready-to-paste rule; once added to a site mapping file named in the
configuration and the configuration reloaded (SIGHUP), ``queue --regrade`` grades the study
again and the new result uses the measure."""

from __future__ import annotations

import io
import json
import signal
import tomllib

import pydicom
import pytest
from netutil import NodeProcess, send, wait_for, write_config

from service.cli import main as cli_main
from service.demo.scenario import CASES, case_datasets
from service.store.sqlite_journal import SqliteJournal

pytestmark = pytest.mark.network


def _num_values(ds, code_value: str) -> list[float]:
    """Numeric values of every NUM item with this concept code anywhere in the content tree."""
    out = []
    stack = list(ds.get("ContentSequence", []))
    while stack:
        item = stack.pop()
        name = item.get("ConceptNameCodeSequence")
        if item.get("ValueType") == "NUM" and name and name[0].CodeValue == code_value:
            out.append(float(item.MeasuredValueSequence[0].NumericValue))
        stack.extend(item.get("ContentSequence", []))
    return out


def test_private_code_taught_on_a_running_node(tmp_path, capsys):
    case = next(c for c in CASES if c.key == "grade-2")  # LAVI coded as (HV-LAVI, 99HVCC)
    (source,) = case_datasets(case)[:1]
    src_file = tmp_path / "grade-2.dcm"
    source.save_as(src_file, enforce_file_format=True)
    study = str(source.StudyInstanceUID)
    cfg = write_config(tmp_path / "node.toml", "[grading]\nmapping_files = []\n")
    data = tmp_path / "data"
    node = NodeProcess(data, ["--config", str(cfg), "--port", "0", "--settle-seconds", "0"])
    try:
        port = node.start()
        assert send([source], port) == [0]

        def results():
            j = SqliteJournal(data / "journal.sqlite3")
            try:
                return j.results(study)
            finally:
                j.close()

        def stored(result):
            """The result SR as the node stored it in its journal."""
            j = SqliteJournal(data / "journal.sqlite3")
            try:
                return pydicom.dcmread(io.BytesIO(j.result_data(result["result_uid"])))
            finally:
                j.close()

        first = wait_for(lambda: results(), 60)[0]
        before = stored(first)
        assert _num_values(before, "LAVI") == []  # not recognised yet

        assert cli_main(["inspect", "--json", str(src_file)]) == 0
        report = json.loads(capsys.readouterr().out)
        rule = next(u for u in report["unrecognised"] if u["concept"]["value"] == "HV-LAVI")
        site = tmp_path / "site-mapping.toml"
        site.write_text(rule["suggested_rule"].replace('measure = "?"', 'measure = "lavi"'))
        assert tomllib.loads(site.read_text())["rule"][0]["measure"] == "lavi"
        write_config(cfg, '[grading]\nmapping_files = ["site-mapping.toml"]\n')
        assert cli_main(["check-config", "--quiet", str(cfg)]) == 0
        node.proc.send_signal(signal.SIGHUP)
        wait_for(lambda: '"config_reloaded"' in node.log(), 20)

        assert cli_main(["queue", "--data-dir", str(data), "--regrade", study]) == 0
        capsys.readouterr()
        second = wait_for(lambda: results()[1:] and results()[-1], 60)
        after = stored(second)
        assert set(_num_values(after, "LAVI")) == {41.0}  # the value the scanner sent
        assert second["result_uid"] != first["result_uid"]
        assert node.terminate() == 0
    finally:
        node.kill()
