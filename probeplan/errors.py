"""Errors that mean "bad input": the CLI turns them into one message and exit status 2."""

from __future__ import annotations

#: Exit status of an interrupted run (128 + SIGINT, the shell convention).
EXIT_INTERRUPTED = 130


class InputError(ValueError):
    """Bad input from a user: a config, a layout file, an argument.

    The message alone must tell the user what to change: the file, the key or line, what
    was found and what is allowed. It subclasses ``ValueError`` so that API callers who
    catch ``ValueError`` catch it too.
    """
