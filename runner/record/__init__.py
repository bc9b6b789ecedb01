"""The run record: the sealed run folder and everything that reads it.

Acceptance limits and verdicts (``limits``), the run folder's files
(``folder``), the hash-chained ledger, its check and signature (``ledger``),
open-format exports (``export``) and comparing two runs (``compare``).
"""
