"""``python -m linkage``: the same command line as ``linkage``."""

from linkage.cli.main import main

main()
