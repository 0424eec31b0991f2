"""Run the per-file work on a Dask distributed cluster (``--cluster ADDRESS``).

The screening process keeps everything else (finding files, hashing,
resumption, reports, summary); only the per-file work moves. Each task is the
same :class:`~replicheck.screen.task.Task` the local runner gets, and workers
read the data file **by its path**: the path must be visible to every worker
(a shared file system mounted at the same place). Workers need replicheck
installed, at the same version (checked on connection).

Time limits hold on the cluster too: a task hands its file to a warden process
on the worker (:mod:`replicheck.screen.warden`), which screens it in a fresh
child killed at the time limit, exactly as a local run does. Dask itself is
imported only here, only when ``--cluster`` is given.
"""

from __future__ import annotations

import subprocess
import sys
import threading
import uuid
from collections.abc import Iterator, Sequence
from typing import Any

from replicheck import __version__
from replicheck.errors import InputError
from replicheck.screen.task import Failure, one_line

CONNECT_TIMEOUT = "10s"
WORKER_WAIT_SECONDS = 30.0
#: Extra seconds a task waits for its warden beyond the time limit (warden start-up).
WARDEN_GRACE = 120.0
INSTALL_HINT = "pip install 'replicheck[cluster]'"


def _distributed() -> Any:
    try:
        import distributed
    except ImportError:
        raise InputError(
            f"--cluster needs Dask distributed, which is not installed: {INSTALL_HINT}"
        ) from None
    return distributed


def worker_version() -> str:
    """The replicheck version a worker runs (called on the workers)."""
    return __version__


def connect(address: str) -> Any:
    """A Dask client for the scheduler at ``address``, with workers running this replicheck.

    Raises :class:`InputError` when Dask is missing, the scheduler cannot be
    reached, no worker joins, or a worker runs another replicheck version.
    """
    distributed = _distributed()
    try:  # a bad address is refused here: a Client left half-built hangs on exit
        distributed.comm.resolve_address(address)
    except (ValueError, TypeError, OSError) as err:
        raise InputError(
            f"--cluster {address} is not a Dask scheduler address ({one_line(err)}); "
            "write it as tcp://HOST:PORT"
        ) from None
    try:
        client = distributed.Client(address, timeout=CONNECT_TIMEOUT, set_as_default=False)
    except Exception as err:  # OSError, TimeoutError, ValueError for a bad address...
        raise InputError(
            f"cannot connect to the Dask scheduler at {address}: {one_line(err)}"
        ) from None
    try:
        try:
            client.wait_for_workers(1, timeout=WORKER_WAIT_SECONDS)
        except Exception:
            raise InputError(f"no Dask worker joined the scheduler at {address}") from None
        try:
            versions = client.run(worker_version)
        except Exception as err:
            raise InputError(
                f"the Dask workers at {address} cannot run replicheck ({one_line(err)}): "
                f"install it there ({INSTALL_HINT})"
            ) from None
        other = sorted({v for v in versions.values() if v != __version__})
        if other:
            raise InputError(
                f"the Dask workers at {address} run replicheck {', '.join(other)}, this machine "
                f"{__version__}: install the same version everywhere"
            )
    except BaseException:
        client.close()
        raise
    return client


class _Warden:
    """One warden process and the pipes to it."""

    def __init__(self) -> None:
        self.process = subprocess.Popen(
            [sys.executable, "-m", "replicheck.screen.warden"],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
        )

    def ask(self, request: object, wait: float | None) -> object:
        """Send a request and wait for the answer; TimeoutError after ``wait`` seconds."""
        from replicheck.screen.warden import receive, send

        assert self.process.stdin is not None and self.process.stdout is not None
        send(self.process.stdin, request)
        answer: list[object] = []
        problem: list[BaseException] = []

        def read() -> None:
            assert self.process.stdout is not None
            try:
                answer.append(receive(self.process.stdout))
            except BaseException as err:
                problem.append(err)

        reader = threading.Thread(target=read, daemon=True)
        reader.start()
        reader.join(wait)
        if reader.is_alive():
            raise TimeoutError
        if problem:
            raise problem[0]
        return answer[0]

    def close(self) -> None:
        if self.process.poll() is None:
            self.process.kill()
        self.process.wait()


_IDLE: list[_Warden] = []
_LOCK = threading.Lock()


def cluster_work(task: object, time_limit: float | None) -> object:
    """Screen one file on a Dask worker, through an idle warden (started when none is idle)."""
    with _LOCK:
        warden = _IDLE.pop() if _IDLE else None
    if warden is None or warden.process.poll() is not None:
        warden = _Warden()
    wait = None if time_limit is None else time_limit + WARDEN_GRACE
    try:
        result = warden.ask((task, time_limit), wait)
    except TimeoutError:
        warden.close()
        return Failure("timeout", f"no answer within the time limit of {time_limit:g} s")
    except Exception as err:
        warden.close()
        return Failure("unreadable", f"the warden process on the worker failed: {one_line(err)}")
    with _LOCK:
        _IDLE.append(warden)
    return result


def run_cluster(
    client: Any, tasks: Sequence[object], *, time_limit: float | None
) -> Iterator[tuple[int, object]]:
    """Run every task on the cluster; yield ``(index, result)`` as each ends."""
    distributed = _distributed()
    if not tasks:
        return
    batch = uuid.uuid4().hex
    futures = client.map(
        cluster_work,
        list(tasks),
        time_limit=time_limit,
        pure=False,
        key=[f"replicheck-screen-{batch}-{i}" for i in range(len(tasks))],
    )
    where = {f.key: i for i, f in enumerate(futures)}
    try:
        for future in distributed.as_completed(futures, loop=client.loop):
            try:
                result = future.result()
            except Exception as err:  # a lost worker, a failed task
                result = Failure("unreadable", f"the cluster task failed: {one_line(err)}")
            yield where[future.key], result
    finally:
        client.cancel(futures)
