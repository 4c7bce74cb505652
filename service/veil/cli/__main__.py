"""``python -m veil.cli``: the same as the ``veil`` command."""

from veil.cli import main

raise SystemExit(main())
