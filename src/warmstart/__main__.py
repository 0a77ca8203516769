"""``python -m warmstart`` runs the command line."""
from warmstart.cli import main  # absolute: DDP launchers rerun this file as a script

raise SystemExit(main())
