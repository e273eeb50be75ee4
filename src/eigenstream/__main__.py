"""``python -m eigenstream`` runs the command line."""

from eigenstream.cli import main

raise SystemExit(main())
