"""``python -m pipeline`` runs the ``isogap`` command line."""

from pipeline.cli import main

main()
