"""``python -m migrate`` runs the stateshift command line."""

from .cli import main

raise SystemExit(main())
