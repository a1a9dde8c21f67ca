"""The quality audit of the lab's diastolic reporting: what the node records about each study
when it grades it (:mod:`facts`), which missing measure kept a study from being decided
(:mod:`counterfactual`), the figures over a period (:mod:`report`), and their rendering as a
self-contained HTML page, JSON and an optional PDF (:mod:`render`, :mod:`pdf`)."""
