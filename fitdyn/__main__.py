"""Entry point for ``python -m fitdyn``."""

from fitdyn.cli import main

raise SystemExit(main())
