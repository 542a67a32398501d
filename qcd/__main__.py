"""``python -m qcd`` runs the command line."""
from qcd.cli import main

raise SystemExit(main())
