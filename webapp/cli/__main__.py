"""``python -m webapp.cli``: the same as the ``latentdesk`` command."""

from webapp.cli import main

raise SystemExit(main())
