"""``backfill``: grade the echo SR studies already in an archive, through the node's own
journal, grading and delivery (:mod:`service.backfill.runner`)."""
