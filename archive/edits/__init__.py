"""Manual edits: immutable, reasoned decisions on occupations of stations.

One home for the rules of edits, below the solver (which applies exclude spans) and below
deliveries (which apply the rest):

- :mod:`~archive.edits.kinds`: the kinds of edit, their payloads and position/height sources;
- :mod:`~archive.edits.log`: recording an edit with its ledger event, which edits are in
  force (superseding, undo), listings and the hashed edit sets a delivery rests on;
- :mod:`~archive.edits.spans`: exclude spans, from payloads to the fixes they leave out;
- :mod:`~archive.edits.targets`: which station and occupation an edit names;
- :mod:`~archive.edits.decisions`: the edits people make (set a position or a height,
  exclude a span, reject, undo). Acknowledging a review flag checks the flags of a run, so
  it lives with the review above the solver (:mod:`archive.review`).
"""
