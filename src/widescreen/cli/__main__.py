"""``python -m widescreen.cli``: the same as the ``widescreen`` command."""

from . import main

main()
