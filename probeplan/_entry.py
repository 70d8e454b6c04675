"""The ``probeplan`` command's entry point: loads the program with Ctrl-C already covered.

Importing the command line pulls in numpy, scipy, numba and the rest (about a second on a cold
machine); a Ctrl-C in that time would otherwise end in a Python traceback, and a SIGTERM would
end the process with status 143. From here on SIGTERM means what Ctrl-C means (status 130), and
the command's own handling (:func:`probeplan.cli.main`) takes over once it is loaded.
"""

from __future__ import annotations

import signal
import sys

from .errors import EXIT_INTERRUPTED, raise_interrupt


def main(argv: list[str] | None = None) -> int:
    """Run the ``probeplan`` command line (see :func:`probeplan.cli.main`)."""
    try:
        signal.signal(signal.SIGTERM, raise_interrupt)
        from .cli import main as run
    except KeyboardInterrupt:
        sys.stderr.write("probeplan: interrupted while starting; no result file was written.\n")
        return EXIT_INTERRUPTED
    return run(argv)
