"""``python -m blockyard`` is the same as the ``blockyard`` command."""

from blockyard.cli import main

raise SystemExit(main())
