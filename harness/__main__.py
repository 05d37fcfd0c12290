"""``python -m harness`` is the same as the ``harness`` command."""

from harness.cli import main

raise SystemExit(main())
