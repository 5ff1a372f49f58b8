"""``python -m allocator`` runs the command line."""

from .cli.main import main

main()
