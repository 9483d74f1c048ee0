"""``python -m reduce`` runs the command line."""

from reduce.cli import main

main()
