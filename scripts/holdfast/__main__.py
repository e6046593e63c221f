"""``python -m holdfast`` runs the command-line interface."""

from .cli import entry

entry()
