"""``python -m latchwatch``: the command line."""

from latchwatch.server.cli.main import main

raise SystemExit(main())
