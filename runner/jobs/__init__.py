"""Whole jobs built on the stages: a run of a recipe over a lot (``run``), a
rerun from a record (``rerun``) and the bundled demo scenarios (``demo``)."""
