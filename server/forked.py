"""Work done in a forked child process while this one goes on: the second core of a
one-shot command.

The command line adjusts one field book and exits; a stage that reads only the parsed
book (the misclosures) can run beside the network, start values and engine. ``os.fork``
gives the child everything as it is, without copying or pickling the input (a million
marks' book would take seconds to pickle); the child pickles its answer into a pipe and
leaves with ``os._exit``, so it never flushes the parent's buffers or runs its exit
handlers. Anything that goes wrong in the child (an exception, a signal, no fork on this
platform) makes ``Pending.result`` compute the answer here instead, so what the caller
gets, and any error it raises, is exactly what the plain call would give.

Only for a process that runs nothing else: forking a multi-threaded process is unsafe
(another thread may hold a lock the child then waits for), so with other threads running
the answer is computed here, and the service adjusts without it.
"""

from __future__ import annotations

import contextlib
import os
import pickle
import signal
import threading
from collections.abc import Callable
from typing import Generic, TypeVar

T = TypeVar("T")

#: What a child that failed writes instead of its answer.
_FAILED = b"!"


class Pending(Generic[T]):
    """The answer of ``compute(*args)``, being computed in a child process (or not)."""

    def __init__(self, compute: Callable[[], T]) -> None:
        self._compute = compute
        self._child: int | None = None
        self._pipe: int | None = None
        # another thread could hold a lock the child would then wait for forever
        if not hasattr(os, "fork") or threading.active_count() > 1:
            return
        read, write = os.pipe()
        try:
            pid = os.fork()
        except OSError:  # no process left to fork: computed here when asked for
            os.close(read)
            os.close(write)
            return
        if pid == 0:  # the child: compute, send, leave without any clean-up of the parent's
            os.close(read)
            status = 0
            try:
                data = pickle.dumps(compute(), protocol=pickle.HIGHEST_PROTOCOL)
            except BaseException:  # the parent computes it again, and raises what it raises
                data, status = _FAILED, 1
            try:
                with os.fdopen(write, "wb") as pipe:
                    pipe.write(data)
            except BaseException:  # the parent went away, or stopped reading
                status = 1
            os._exit(status)
        os.close(write)
        self._child, self._pipe = pid, read

    def close(self) -> None:
        """Stop and reap a child whose answer is no longer wanted (the caller failed)."""
        if self._child is None or self._pipe is None:
            return
        child, pipe = self._child, self._pipe
        self._child = self._pipe = None
        os.close(pipe)
        with contextlib.suppress(ProcessLookupError):  # it may have finished
            os.kill(child, signal.SIGKILL)
        os.waitpid(child, 0)

    def result(self) -> T:
        """The answer: the child's, or computed here if the child gave none."""
        if self._child is None or self._pipe is None:
            return self._compute()
        child, pipe = self._child, self._pipe
        self._child = self._pipe = None
        with os.fdopen(pipe, "rb") as stream:
            data = stream.read()
        _, status = os.waitpid(child, 0)
        if status != 0 or data == _FAILED or not data:
            return self._compute()
        # our own child's bytes, through a pipe no one else holds: not untrusted input
        answer: T = pickle.loads(data)  # noqa: S301
        return answer
