"""``python -m lotproof``: the same as the ``lotproof`` command."""

from lotproof.runner.cli.entry import main

main()
