"""``python -m federation.cli``: the same as the ``federation`` command."""

from federation.cli import main

raise SystemExit(main())
