"""``python -m spatialplan`` runs the command line."""

from spatialplan.cli import main

main()
