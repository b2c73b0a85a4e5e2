"""``python -m trainer`` runs the ``hashcurve`` command line."""

from trainer.cli import main

raise SystemExit(main())
