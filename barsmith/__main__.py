"""``python -m barsmith`` runs the command line."""

from barsmith.cli import main

raise SystemExit(main())
