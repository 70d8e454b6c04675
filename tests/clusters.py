"""What the cluster tests share: a worker killed while it runs a task (a real SIGKILL)."""

from __future__ import annotations

import contextlib
import os
import signal
import threading
import time
from collections.abc import Callable, Iterator


def run_killing_a_worker(client, work: Callable[[], object], what: str) -> object:
    """``work()`` run in a thread; the first worker process seen running a task is killed
    (SIGKILL), and ``work()``'s result returned once it is done.

    ``client`` is a ``distributed.Client`` of a cluster of worker processes; ``what`` names
    the tasks for the message when none starts.
    """
    pids = client.run(os.getpid)  # worker address -> process id
    out: dict = {}
    runner = threading.Thread(target=lambda: out.update(result=work()))
    runner.start()
    victim = None
    for _ in range(2000):  # until a task runs on a worker (bounded by a count)
        busy = [w for w, tasks in client.processing().items() if tasks]
        if busy:
            victim = busy[0]
            break
        time.sleep(0.02)
    assert victim is not None, f"no {what} started on the cluster"
    os.kill(pids[victim], signal.SIGKILL)
    runner.join()
    return out["result"]


@contextlib.contextmanager
def process_client() -> Iterator[object]:
    """A client of a scheduler and two single-thread worker processes on this machine (what is
    sent to them is pickled, as on a real cluster)."""
    import distributed

    with (
        distributed.LocalCluster(
            processes=True, n_workers=2, threads_per_worker=1, dashboard_address=":0"
        ) as cluster,
        distributed.Client(cluster, set_as_default=False) as client,
    ):
        yield client
