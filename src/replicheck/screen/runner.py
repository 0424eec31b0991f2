"""Run the per-file work in child processes, several at once, each under a time limit.

Every file is screened in a fresh child process. That keeps files apart (no
state, memory or random-number stream shared between files, so results do
not depend on ``--jobs`` or on the order), lets a stuck file be killed when
it passes the time limit, and turns a crash of the child (killed, out of
memory, a fault in a compiled library) into an ``unreadable`` row for that
file alone, with the reason, while the batch goes on.

On POSIX systems children are forked from a "forkserver" process that has
imported the statistics stack once (:mod:`multiprocessing`'s ``forkserver``
start method with a preload), so a child starts in milliseconds; elsewhere
each child is a fresh interpreter (``spawn``).
"""

from __future__ import annotations

import importlib
import multiprocessing as mp
import signal
import time
import warnings
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from multiprocessing.connection import Connection, wait
from multiprocessing.process import BaseProcess
from typing import Any

from replicheck.screen.task import Failure, one_line

#: The per-file work, as ``module:function``; resolved in the child.
WORK = "replicheck.screen.work:run_task"
_PRELOAD = "replicheck.screen.preload"
_JOIN_SECONDS = 10.0


def context() -> Any:
    """The start method for children: forkserver with the work preloaded, else spawn."""
    if "forkserver" in mp.get_all_start_methods():
        ctx = mp.get_context("forkserver")
        ctx.set_forkserver_preload([_PRELOAD])
        return ctx
    return mp.get_context("spawn")


def warm_up() -> None:
    """Start the forkserver now, so that its imports overlap the caller's own work."""
    if context().get_start_method() == "forkserver":
        from multiprocessing import forkserver

        forkserver.ensure_running()


def _resolve(ref: str) -> Callable[[Any], Any]:
    module, _, name = ref.partition(":")
    fn = getattr(importlib.import_module(module), name)
    assert callable(fn)
    return fn


def _child(work: str, task: object, conn: Connection) -> None:
    """Child process: run the work on one task and send the result back."""
    warnings.simplefilter("ignore")  # keep the parent's progress display clean
    try:
        result: object = _resolve(work)(task)
    except Exception as err:  # the work catches its own errors; this is the last guard
        result = Failure("internal-error", one_line(err))
    conn.send(result)
    conn.close()


def _died(exitcode: int | None) -> str:
    if exitcode is None:
        return "the worker process stopped answering"
    if exitcode < 0:
        try:
            name = signal.Signals(-exitcode).name
        except ValueError:
            name = f"signal {-exitcode}"
        return f"the worker process was killed ({name}) before finishing this file"
    return f"the worker process exited with code {exitcode} before finishing this file"


@dataclass
class _Running:
    index: int
    process: BaseProcess
    conn: Connection
    started: float


def _stop(process: BaseProcess) -> None:
    if process.is_alive():
        process.kill()
    process.join(_JOIN_SECONDS)


def _collect(run: _Running) -> object:
    """The result a finished child sent, or a Failure when it died without one."""
    try:
        if not run.conn.poll():
            raise EOFError
        result = run.conn.recv()
    except (EOFError, OSError):
        run.process.join(_JOIN_SECONDS)
        result = Failure("unreadable", _died(run.process.exitcode))
    except Exception as err:  # a result that cannot be unpickled
        result = Failure("internal-error", f"the result could not be received: {one_line(err)}")
    run.process.join(_JOIN_SECONDS)
    if run.process.is_alive():
        _stop(run.process)
    return result


def run_local(
    tasks: Sequence[object],
    *,
    jobs: int,
    time_limit: float | None,
    work: str = WORK,
) -> Iterator[tuple[int, object]]:
    """Run ``work`` on every task in child processes; yield ``(index, result)`` as each ends.

    At most ``jobs`` children run at once. A child still running ``time_limit``
    seconds after it started is killed and gives ``Failure("timeout")``; a
    child that dies without a result gives ``Failure("unreadable")`` with the reason.
    Stopping the iteration (or an interruption) kills the children still running.
    """
    if jobs < 1:
        raise ValueError("jobs must be at least 1")
    limit = time_limit if time_limit else None
    ctx = context()
    queue = list(enumerate(tasks))
    queue.reverse()
    running: list[_Running] = []
    try:
        while queue or running:
            while queue and len(running) < jobs:
                index, task = queue.pop()
                receive, send = ctx.Pipe(duplex=False)
                process = ctx.Process(target=_child, args=(work, task, send), daemon=True)
                try:
                    process.start()
                except OSError as err:  # out of processes or file handles
                    receive.close()
                    send.close()
                    yield index, Failure("internal-error", f"no worker process: {one_line(err)}")
                    continue
                send.close()
                running.append(_Running(index, process, receive, time.monotonic()))
            if not running:
                continue
            timeout = None
            if limit is not None:
                timeout = max(0.0, min(r.started + limit for r in running) - time.monotonic())
            handles: list[Any] = [r.conn for r in running] + [r.process.sentinel for r in running]
            ready = set(wait(handles, timeout))
            now = time.monotonic()
            for run in list(running):
                if run.conn in ready or run.process.sentinel in ready:
                    result = _collect(run)
                elif limit is not None and now >= run.started + limit:
                    _stop(run.process)
                    result = Failure(
                        "timeout",
                        f"stopped after the time limit of {limit:g} s (--time-limit)",
                        now - run.started,
                    )
                else:
                    continue
                if isinstance(result, Failure) and not result.seconds:
                    result = Failure(result.status, result.message, now - run.started)
                running.remove(run)
                run.conn.close()
                yield run.index, result
    finally:
        for run in running:
            _stop(run.process)
            run.conn.close()
