"""``python -m jostle.cli``: the same as the ``jostle`` command."""
from jostle.cli.commands import main

raise SystemExit(main())
