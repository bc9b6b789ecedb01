"""Evaluating a recipe on one image: inputs, hashing, the cache, the evaluation.

Reading images read-only with their calibration (``inputs``), checksums and
cache keys (``hashing``), the content-addressed store (``cache``), running the
graph on one sample (``image``), the small display pictures made alongside
(``pictures``) and the software and machine a result depends on
(``environment``).
"""
