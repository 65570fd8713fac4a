"""``python -m passby`` runs the command-line interface."""

from passby.cli import main

raise SystemExit(main())
