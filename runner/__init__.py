"""lotproof's machinery, one sub-package per stage of a run, in the order data flows.

``recipe``   recipe text -> checked model -> step graph (YAML positions, schema, diff)
``evaluate`` one image: reading inputs, hashing, the cache, evaluating the graph
``lot``      spreading a lot's images over local processes or a dask cluster
``record``   the run folder: files, ledger, verdicts, signatures, exports, compare
``show``     what people look at: the report, the preview sheet
``jobs``     whole jobs built on the stages above: a run, a rerun, the demo
``study``    validation studies: a plan's precision, trueness and robustness, sealed
``cli``      the command line, a thin layer over the jobs and stages

Imports go one way, down this list (``errors`` and ``files`` serve every stage);
``tests/test_layout.py`` keeps it so.
"""

__version__ = "0.1.0"
