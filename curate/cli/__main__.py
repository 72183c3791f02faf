"""Run the command line as ``python -m curate.cli``."""

from curate.cli.app import main

main()
