"""``python -m fcnkit`` runs the command-line interface."""

from fcnkit.cli import run

run()
