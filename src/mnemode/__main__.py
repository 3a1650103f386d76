"""``python -m mnemode`` is the ``mnemode`` command."""

from .cli import main

main()
