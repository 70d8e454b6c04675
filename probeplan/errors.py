"""The error boundary: what means "bad input", and the command's exit statuses.

Bad input (a config, a layout or result file, an argument) raises :class:`InputError` where
it enters the program; the command line turns it, and only it, into exit status 2. Every other
exception is a bug: exit status 1. This module imports nothing heavy, so the command's entry
point (:mod:`probeplan._entry`) can use it before numpy and the rest are loaded.
"""

from __future__ import annotations

import os
import signal
import threading
import time

#: Exit status of a finished command.
EXIT_OK = 0
#: Exit status of an internal error (a bug in probeplan).
EXIT_INTERNAL = 1
#: Exit status of bad input: the one line printed says what to change.
EXIT_INPUT = 2
#: Exit status of an interrupted run (128 + SIGINT, the shell convention), SIGTERM included.
EXIT_INTERRUPTED = 130


class InputError(ValueError):
    """Bad input from a user: a config, a layout file, an argument.

    The message alone must tell the user what to change: the file, the key or line, what
    was found and what is allowed. It subclasses ``ValueError`` so that API callers who
    catch ``ValueError`` catch it too.
    """


def raise_interrupt(signum, frame) -> None:
    """A signal handler: SIGTERM means what Ctrl-C means (KeyboardInterrupt, exit status 130)."""
    raise KeyboardInterrupt


#: Seconds between a helper process's checks that its parent is still alive.
PARENT_POLL_S = 0.5


def helper_context():
    """The multiprocessing context of a command's helper processes: "spawn", fresh
    interpreters. A process that has run compiled parallel loops (numba's OpenMP threads)
    cannot safely fork — the GNU OpenMP runtime ends the child ("fork() called from a process
    already using GNU OpenMP") — and the search runs such loops before a budget or a locate
    starts its helpers."""
    import multiprocessing

    return multiprocessing.get_context("spawn")


def helper_process_init(parent_pid: int) -> None:
    """Initialiser of a command's helper processes (worker pools, a stop flag's manager).

    Ctrl-C reaches the whole process group; only the parent handles it (it sets the shared
    stop flag or cancels what has not started, and the helpers finish their current step). A
    parent that dies without shutting its helpers down (SIGKILL, a crash) cannot stop them: a
    daemon thread in each helper ends it once its parent is gone (it is then re-parented, so
    ``getppid`` changes).

    Parameters
    ----------
    parent_pid : int
        ``os.getpid()`` of the parent, taken before the helpers start.
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)

    def watch() -> None:
        while os.getppid() == parent_pid:
            time.sleep(PARENT_POLL_S)
        os._exit(EXIT_INTERRUPTED)

    threading.Thread(target=watch, name="parent-watch", daemon=True).start()
