"""``python -m fcnkit`` runs the command-line interface."""

from fcnkit.cli import main

raise SystemExit(main())
