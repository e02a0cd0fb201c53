"""``python -m loadrun`` is the same as the ``loadrun`` command."""

from loadrun.cli import main

raise SystemExit(main())
