"""Validation studies (``lotproof validate PLAN``): precision, trueness and robustness of a method.

A study is a run: a plan (:mod:`~lotproof.runner.study.plan`) names a recipe and the
images to measure with it; the study measures them through the same per-image
evaluation and cache as a run, computes its statistics
(:mod:`~lotproof.runner.study.stats`), judges the plan's acceptance criteria
(:mod:`~lotproof.runner.study.criteria`) and writes a sealed study folder of its
own (:mod:`~lotproof.runner.study.run`) that ``lotproof verify`` checks like a run
folder. Robustness moves one recipe parameter at a time
(:mod:`~lotproof.runner.study.variants`).
"""
