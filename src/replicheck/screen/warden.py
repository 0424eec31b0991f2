"""A warden process for cluster workers: screens one file at a time under the time limit.

Dask runs tasks in daemonic worker processes, which may not start child
processes through :mod:`multiprocessing`. A task therefore hands its file to
this warden, a plain interpreter started with :mod:`subprocess`
(``python -m replicheck.screen.warden``), which runs the same local runner as
``replicheck screen`` without a cluster: a fresh child per file, killed at the
time limit. The warden keeps running between tasks (its forkserver has the
statistics stack loaded) and exits when its standard input closes, that is
when the Dask worker that started it goes away.

Messages on stdin and stdout are pickles preceded by their length (8 bytes,
big-endian). Only the worker that started the warden talks to it.
"""

from __future__ import annotations

import os
import pickle
import struct
import sys
from typing import IO

from replicheck.screen.runner import run_local

_HEADER = struct.Struct(">Q")


class Closed(Exception):
    """The other end of the pipe went away."""


def send(stream: IO[bytes], obj: object) -> None:
    """Write one message and flush."""
    data = pickle.dumps(obj, protocol=pickle.HIGHEST_PROTOCOL)
    stream.write(_HEADER.pack(len(data)) + data)
    stream.flush()


def _read_exact(stream: IO[bytes], n: int) -> bytes:
    chunks: list[bytes] = []
    while n > 0:
        chunk = stream.read(n)
        if not chunk:
            raise Closed
        chunks.append(chunk)
        n -= len(chunk)
    return b"".join(chunks)


def receive(stream: IO[bytes]) -> object:
    """Read one message; raises :class:`Closed` at end of stream."""
    (size,) = _HEADER.unpack(_read_exact(stream, _HEADER.size))
    return pickle.loads(_read_exact(stream, size))


def main() -> None:
    """Serve requests ``(task, time_limit)`` until stdin closes; answer each with its result."""
    replies = os.fdopen(os.dup(sys.stdout.fileno()), "wb")
    os.dup2(sys.stderr.fileno(), sys.stdout.fileno())  # stray prints must not mix with replies
    requests = sys.stdin.buffer
    while True:
        try:
            request = receive(requests)
        except Closed:
            return
        assert isinstance(request, tuple)
        task, time_limit = request
        for _, result in run_local([task], jobs=1, time_limit=time_limit):
            send(replies, result)


if __name__ == "__main__":
    main()
