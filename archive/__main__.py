"""``python -m archive`` runs the nodekeep command."""

from archive.cli.main import entry

entry()
