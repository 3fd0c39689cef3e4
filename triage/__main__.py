"""`python -m triage` runs the command line."""

from triage.cli.main import main

raise SystemExit(main())
