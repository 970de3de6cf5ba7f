"""``python -m densemem``: the same as the ``densemem`` command."""

from .cli import main

raise SystemExit(main())
