"""The ``probeplan`` command's entry point: loads the program with Ctrl-C already covered.

Importing the command line pulls in numpy, scipy, numba and the rest (about a second on a cold
machine); a Ctrl-C in that time would otherwise end in a Python traceback, and a SIGTERM would
end the process with status 143. From here on SIGTERM means what Ctrl-C means (status 130), and
the command's own handling (:func:`probeplan.cli.main`) takes over once it is loaded.
"""

from __future__ import annotations

import os
import signal
import sys
from typing import NoReturn

from .errors import EXIT_INTERRUPTED, raise_interrupt


def main(argv: list[str] | None = None) -> NoReturn:
    """Run the ``probeplan`` command line (see :func:`probeplan.cli.main`) and end the process
    with its exit status.

    Once the command has returned, its files are written and its last line printed: the
    process then ends at once, with SIGINT and SIGTERM held, instead of through the
    interpreter's shutdown. That shutdown takes a while with numpy, numba and h5py loaded and
    puts the default signal handlers back first, so a signal in it ended the process by the
    signal (status −15) after a run that had finished and said so.
    """
    try:
        signal.signal(signal.SIGTERM, raise_interrupt)
        from .cli import main as run
    except KeyboardInterrupt:
        sys.stderr.write("probeplan: interrupted while starting; no result file was written.\n")
        _end(EXIT_INTERRUPTED)
    try:
        code = run(argv)
    except KeyboardInterrupt:  # a signal in the instant between the command's end and here
        code = EXIT_INTERRUPTED
    _end(code)


def _end(code: int) -> NoReturn:
    """Hold SIGINT and SIGTERM, flush what was printed, and end the process with ``code``."""
    if hasattr(signal, "pthread_sigmask"):  # POSIX
        signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # a reader that left, or a closed stream: nothing to do
            pass
    os._exit(code)
