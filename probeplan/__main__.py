"""``python -m probeplan``: the same as the ``probeplan`` command."""

from ._entry import main

raise SystemExit(main())
