"""``python -m probeplan``: the same as the ``probeplan`` command."""

from .cli import main

raise SystemExit(main())
