"""Warm-up of the grading pipeline, run on import by the node's fork server (the process its
grading processes are forked from).

The first study a fresh interpreter grades pays for data the pipeline loads on first use (the
DICOM standard's module tables read by the result header, pydicom's dictionaries, ...): about
a second of CPU.  Grading one invented study here, once, means every grading process (also
one replacing a crashed one) starts with all of it in place.
"""

from __future__ import annotations

from service.network.grading_worker import warm_up_pipeline

warm_up_pipeline()
