"""backfill against a second query/retrieve peer: DCMTK's ``dcmqrscp`` (Debian ``dcmtk``), an
archive that answers Study Root C-FIND and C-GET differently from Orthanc: it does not match
Modalities in Study (every study of the period comes back) and returns no SOP Class UID at
IMAGE level; its series query does match Modality."""

from __future__ import annotations

import os
import subprocess
from datetime import date

import pytest
from backfillutil import echo_study, image_in, node_config, run_backfill
from netutil import LOOPBACK, echo_ok, free_port, send, wait_for

DCMQRSCP = "/usr/bin/dcmqrscp"
QR_AE = "HV_QR"

pytestmark = [
    pytest.mark.network,
    pytest.mark.external,
    pytest.mark.skipif(
        not os.access(DCMQRSCP, os.X_OK) and not os.environ.get("CI"),
        reason="DCMTK dcmqrscp missing; install dcmtk as the README's test command does",
    ),
]


@pytest.fixture
def dcmqrscp(tmp_path):
    storage = tmp_path / "qr-storage"
    storage.mkdir()
    port = free_port()
    config = tmp_path / "dcmqrscp.cfg"
    # the configuration format of DCMTK's dcmqrscp.cfg (Debian /etc/dcmtk/dcmqrscp.cfg)
    config.write_text(
        f"NetworkTCPPort = {port}\nMaxPDUSize = 16384\nMaxAssociations = 16\n"
        "HostTable BEGIN\nHostTable END\nVendorTable BEGIN\nVendorTable END\n"
        f"AETable BEGIN\n{QR_AE} {storage} RW (100, 256mb) ANY\nAETable END\n",
        encoding="utf-8",
    )
    with open(tmp_path / "dcmqrscp.log", "wb") as log:
        proc = subprocess.Popen(
            [DCMQRSCP, "-c", str(config), "--disable-host-lookup"],
            stdout=log,
            stderr=subprocess.STDOUT,
            env={**os.environ, "TCP_NODELAY": "1"},
        )
    try:
        wait_for(lambda: echo_ok(port, QR_AE) or proc.poll() is not None, 20)
        assert proc.poll() is None, (tmp_path / "dcmqrscp.log").read_text()
        yield port
    finally:
        proc.terminate()
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5)


def test_c_find_and_c_get_backfill_from_dcmqrscp(dcmqrscp, tmp_path, node_backend):
    # on each journal: SQLite in the data directory, or a PostgreSQL database several nodes share
    day = date(2022, 9, 14)
    echo = echo_study("qr-echo", day, reports=2)
    images_only = image_in(echo_study("qr-images-only", day)[0])
    assert send([*echo, image_in(echo[0]), images_only], dcmqrscp, called=QR_AE) == [0] * 4
    data_dir = tmp_path / "data"
    config = node_config(data_dir, extra={"journal": node_backend(data_dir)})
    source = f"{QR_AE}@{LOOPBACK}:{dcmqrscp}"

    summary, _ = run_backfill(config, source, since=day, until=day)

    assert summary.state == "finished" and summary.failed == [], summary
    assert summary.found == 2  # dcmqrscp does not match Modalities in Study
    assert summary.graded == 1 and summary.objects == 2  # the two SRs, no image
    assert summary.skipped_reasons == {"no SR object in the study": 1}
    from service.store.journal import open_journal

    journal = open_journal(config)
    try:
        assert journal.shared == bool(config.journal.url)
        objects = journal.objects()
        assert {o["sop_instance_uid"] for o in objects} == {str(ds.SOPInstanceUID) for ds in echo}
        assert {o["calling_ae"] for o in objects} == {QR_AE}
        assert len(journal.results(str(echo[0].StudyInstanceUID))) == 1
    finally:
        journal.close()

    again, _ = run_backfill(config, source, since=day, until=day)
    assert (again.graded, again.objects, again.skipped) == (0, 0, 2), again
