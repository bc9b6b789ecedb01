"""Spreading a lot's images over processes or a cluster.

The executor seam and the local process pool (``local``), a dask.distributed
cluster (``cluster``) and choosing one by name (``choose``). An executor runs
:func:`lotproof.runner.evaluate.image.analyse_sample` per image and hands the
results back in the lot's order; it writes nothing but cache entries.
"""
