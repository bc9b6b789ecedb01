"""``python -m lotproof``: the same as the ``lotproof`` command."""

from lotproof.runner.cli.main import main

main()
