"""``python -m auditor``: the same as the ``panel-audit`` command."""

from auditor.cli import main

raise SystemExit(main())
