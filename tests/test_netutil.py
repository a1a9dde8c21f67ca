"""The tests' own helpers where their behaviour decides a test's verdict."""

from __future__ import annotations

import os
import time

import pytest
from netutil import WRITING_SECONDS, echo_sr, pacs_uids, write_files


def test_pacs_uids_leaves_out_a_file_being_written_but_not_an_old_broken_one(tmp_path):
    ds = echo_sr("netutil-1")
    (done,) = write_files([ds], tmp_path / "src")
    pacs = tmp_path / "pacs"
    pacs.mkdir()
    (pacs / "SR.complete").write_bytes(done.read_bytes())
    partial = pacs / "SR.partial"
    partial.write_bytes(done.read_bytes()[:100])  # as storescp has written it so far
    assert pacs_uids(pacs) == [ds.SOPInstanceUID]
    old = time.time() - WRITING_SECONDS - 1  # nobody is writing it any more: broken
    os.utime(partial, (old, old))
    with pytest.raises(Exception):  # noqa: B017 - whatever pydicom raises for it
        pacs_uids(pacs)
