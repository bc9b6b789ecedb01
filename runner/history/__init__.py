"""The lab's memory: a catalogue of finished runs, queries over it, control charts and capability.

Data flows here from sealed run folders (read through
:class:`~lotproof.runner.record.reading.RunFolder` and checked by
:func:`~lotproof.runner.record.verify.verify_run`) into a catalogue database, and
from the catalogue into lot histories and charts. The run folder stays the source
of truth: everything in the catalogue can be rebuilt from run folders.

Modules, in the order data flows: :mod:`.entry` (a run folder read into one
catalogue entry), :mod:`.schema` (tables and migrations), :mod:`.catalogue`
(which database, opening, recording, rebuilding, querying), :mod:`.listing` (the
lot history: runs by filters, with key values), :mod:`.spc` (the statistics, pure
functions), :mod:`.trend` (one point per lot, charts and capability). The trend
page is :mod:`lotproof.runner.show.trend`; the commands are
:mod:`lotproof.runner.cli.history`.
"""
