"""Running on an existing dask.distributed cluster: where the scheduler is, and the connection.

The address comes from, first to last: the ``--scheduler`` option, the ``PROBEPLAN_SCHEDULER``
environment variable, the config's ``[design] scheduler``. dask is an optional extra
(``pip install "probeplan[cluster]"``); it is imported only when an address is given.

The work sent to the workers is the same plain functions a local process pool runs, with the
same arguments, so a run on a cluster gives the same result as a local one, to the bit; a task
lost with its worker is run again by the scheduler from its arguments.
"""

from __future__ import annotations

import contextlib
import os
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass

from .errors import InputError

#: The environment variable naming the scheduler (between the option and the config key).
SCHEDULER_VARIABLE = "PROBEPLAN_SCHEDULER"
INSTALL_HINT = 'pip install "probeplan[cluster]"'


def scheduler_address(option: str | None, config) -> tuple[str, str] | None:
    """The scheduler to use and where it was set, or None to run on this machine.

    Parameters
    ----------
    option : str or None
        The ``--scheduler`` argument.
    config : probeplan.config.Config
        Its ``design.scheduler`` is the last resort.

    Returns
    -------
    (address, where) or None
        ``where`` names the setting, for messages.
    """
    if option is not None:
        return option, "--scheduler"
    env = os.environ.get(SCHEDULER_VARIABLE, "")
    if env.strip():
        return env.strip(), f"the environment variable {SCHEDULER_VARIABLE}"
    if config.design.scheduler is not None:
        return config.design.scheduler, f"{config.path}: `design.scheduler`"
    return None


@dataclass(frozen=True)
class Cluster:
    """A connected dask client: its ``concurrent.futures`` executor and shared stop events."""

    client: object  # distributed.Client
    address: str

    @property
    def executor(self):
        """A ``concurrent.futures.Executor`` whose tasks run on the cluster's workers."""
        return self.client.get_executor()

    def stop_event(self) -> StopEvent:
        """A fresh stop request, set here and polled by tasks on the workers."""
        return StopEvent(f"probeplan-stop-{uuid.uuid4().hex}", client=self.client)


class StopEvent:
    """A ``distributed.Event`` with ``set()`` / ``is_set()``, picklable to the workers.

    A search polls its stop request between any two steps, many times a second; each look at a
    ``distributed.Event`` is a round trip to the scheduler, so a task looks at most every
    ``poll_s`` seconds and answers from its last look in between.
    """

    def __init__(self, name: str, client=None, poll_s: float = 0.5) -> None:
        self.name, self.poll_s = name, poll_s
        self._client = client
        self._event = None
        self._seen, self._when = False, -float("inf")

    def __getstate__(self) -> dict:
        return {"name": self.name, "poll_s": self.poll_s}

    def __setstate__(self, state: dict) -> None:
        self.__init__(state["name"], None, state["poll_s"])

    def _get(self):
        if self._event is None:
            from distributed import Event

            # On a worker, client=None means the worker's own client.
            self._event = Event(self.name, client=self._client)
        return self._event

    def set(self) -> None:
        self._get().set()
        self._seen = True

    def is_set(self) -> bool:
        now = time.monotonic()
        if not self._seen and now - self._when >= self.poll_s:
            self._seen, self._when = bool(self._get().is_set()), now
        return self._seen


@contextlib.contextmanager
def connect(address: str, where: str, timeout_s: float = 10.0) -> Iterator[Cluster]:
    """Connect to the scheduler at ``address`` for the block, and close the connection after.

    Raises InputError (exit status 2) when dask is not installed or the scheduler cannot be
    reached within ``timeout_s`` seconds; ``where`` names the setting that gave the address.
    """
    try:
        from distributed import Client
    except ImportError:
        raise InputError(
            f"{where} = {address!r} runs on a dask cluster, and dask.distributed is not "
            f"installed; install it with `{INSTALL_HINT}` (here and on the workers)."
        ) from None
    try:
        client = Client(address, timeout=timeout_s, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(
            f"{where}: cannot reach a dask scheduler at {address!r} within {timeout_s:g} s "
            f"({type(exc).__name__}: {exc}); start one with `dask scheduler` and its workers "
            "with `dask worker ADDRESS`, or check the address (e.g. tcp://host:8786)."
        ) from None
    try:
        yield Cluster(client, address)
    finally:
        client.close()
