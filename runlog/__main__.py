"""``python -m runlog`` runs the command line."""

from runlog.cli import main

main()
