"""The cwire/1 transport: the shared region, the buffered reader and the writer.

:mod:`convwitness.boundary.wire.codec` frames messages; this module moves their bytes. The
``Region`` is a file both sides map (arrays at or over its threshold lie there, the
header names their offsets); the ``Reader`` buffers a non-blocking stdout with
deadlines and keeps what the program prints on a side channel apart; ``write_all``
writes a request while absorbing early output so no exchange can deadlock.
"""
from __future__ import annotations

import contextlib
import math
import mmap
import os
import select
import time

import numpy as np

__all__ = ["WireFormatError", "WireEOF", "WireTimeout", "Region", "Reader", "write_all", "a_bytes"]

_CHUNK = 1 << 18               # bytes asked for per read into the reader's buffer


class WireFormatError(Exception):
    """A message that breaks the framing or the header rules."""


class WireEOF(Exception):
    """The stream ended: ``at_boundary`` when no byte of the next message had come."""

    def __init__(self, message: str, at_boundary: bool):
        super().__init__(message)
        self.at_boundary = at_boundary


class WireTimeout(Exception):
    """No complete message came before the deadline."""


def a_bytes(dt: np.dtype, shape) -> int:
    return math.prod(shape) * dt.itemsize


# -- the shared region ------------------------------------------------------------------
class Region:
    """A file both sides map; the client creates and grows it. Arrays under
    ``threshold`` bytes travel inline (the pipe is as fast there)."""

    def __init__(self, fd: int, size: int, path: str = "", threshold: int = 32768,
                 owner: bool = False):
        self.fd, self.path, self.threshold, self.owner = fd, path, threshold, owner
        self.size, self.map = 0, None
        self.remap(size)

    @classmethod
    def create(cls, size: int, threshold: int = 32768) -> "Region":
        import tempfile
        where = "/dev/shm" if os.path.isdir("/dev/shm") and os.access("/dev/shm", os.W_OK) else None
        fd, path = tempfile.mkstemp(prefix="cwire-", dir=where)
        os.ftruncate(fd, size)
        return cls(fd, size, path, threshold, owner=True)

    @classmethod
    def open(cls, path: str, size: int) -> "Region":
        return cls(os.open(path, os.O_RDWR), size, path)

    def remap(self, size: int):
        """Map ``size`` bytes (the owner first grows the file); 0 unmaps."""
        if size == self.size and (self.map is not None or not size):
            return
        if self.owner and size > self.size:
            os.ftruncate(self.fd, size)
        old, self.map, self.size = self.map, None, size
        if old is not None:
            with contextlib.suppress(BufferError):   # a live view keeps the old map alive
                old.close()
        if size:
            self.map = mmap.mmap(self.fd, size)

    def ensure(self, size: int):
        if size > self.size:
            self.remap(max(size, 2 * self.size))

    def put(self, offset: int, a: np.ndarray):
        view = np.frombuffer(self.map, np.uint8, a.nbytes, offset)
        view[...] = a.reshape(-1).view(np.uint8)

    def view(self, offset: int, dtype: np.dtype, shape) -> np.ndarray:
        n = a_bytes(dtype, shape)
        return np.frombuffer(self.map, np.uint8, n, offset).view(dtype).reshape(shape)

    def unlink(self):
        if self.path and self.owner:
            with contextlib.suppress(OSError):
                os.unlink(self.path)
            self.path = ""

    def close(self):
        self.unlink()
        self.remap(0)
        if self.fd >= 0:
            os.close(self.fd)
            self.fd = -1


# -- reading ---------------------------------------------------------------------------
class Reader:
    """Reads messages from an fd, blocking or not, against ``deadline``; counts messages
    and bytes so that errors can name "byte B of message M (stream byte S)"."""

    def __init__(self, fd: int, label: str = "the program", side=None):
        self.fd, self.label, self.side = fd, label, side   # side: (fd, callback) also served
        self.buf, self.pos = bytearray(), 0
        self.consumed = self.msg_start = self.messages = 0   # stream offset of buf[pos], ...
        self.deadline: float | None = None
        self.eof = False
        self._poll = select.poll()
        for f in (fd,) + ((side[0],) if side else ()):
            self._poll.register(f, select.POLLIN)

    def serve_side(self, fd: int, poll) -> bool:
        """Call the side callback when ``fd`` is the side stream; drop it at its end."""
        if self.side is None or fd != self.side[0]:
            return False
        if not self.side[1]():
            for p in {id(self._poll): self._poll, id(poll): poll}.values():
                p.unregister(fd)
            self.side = None
        return True

    def _wait(self):
        timeout = _ms_left(self.deadline)
        if timeout == 0:
            raise WireTimeout(f"still waiting for message {self.messages + 1} from {self.label} "
                              f"(stopped at byte {self.consumed - self.msg_start} of it, stream "
                              f"byte {self.consumed})")
        for fd, _ in self._poll.poll(timeout):
            self.serve_side(fd, self._poll)

    def _os(self, fn, arg):
        """``fn(fd, arg)`` (os.read / os.readv), waiting while the fd has nothing."""
        while True:
            try:
                return fn(self.fd, arg)
            except BlockingIOError:
                self._wait()

    def absorb(self) -> int:
        """Read what is available now into the buffer (while the other side is written)."""
        try:
            chunk = os.read(self.fd, _CHUNK)
        except BlockingIOError:
            return 0
        if not chunk:
            self.eof = True
        self.buf += chunk
        return len(chunk)

    def _fill(self, need: int):
        while len(self.buf) - self.pos < need:
            if self.eof:
                return False
            if self.pos:
                del self.buf[:self.pos]
                self.pos = 0
            chunk = self._os(os.read, max(_CHUNK, need))
            if not chunk:
                self.eof = True
                return False
            self.buf += chunk
        return True

    def _take(self, n: int, what: str = "") -> bytes:
        if not self._fill(n):
            self._short(n - (len(self.buf) - self.pos), what)
        out = bytes(self.buf[self.pos:self.pos + n])
        self.pos += n
        self.consumed += n
        return out

    def _into(self, mv, what: str):
        """Fill ``mv`` exactly: from the buffer, then straight from the fd (no copy)."""
        n, have = len(mv), min(len(mv), len(self.buf) - self.pos)
        mv[:have] = self.buf[self.pos:self.pos + have]
        self.pos += have
        self.consumed += have
        while have < n:
            got = 0 if self.eof else self._os(os.readv, [mv[have:]])
            if not got:
                self.eof = True
                self._short(n - have, what)
            have += got
            self.consumed += got

    def _short(self, missing: int, what: str):
        at = self.consumed + (len(self.buf) - self.pos)
        no, got = self.messages + 1, at - self.msg_start
        if not got:
            raise WireEOF(f"{self.label} closed its stdout before message {no}", True)
        raise WireEOF(f"{self.label} closed its stdout in the middle of message {no}: it ended at "
                      f"byte {got} of the message (stream byte {at}), {missing} byte(s) short of "
                      f"{what}", False)

    def peek(self, n: int = 16) -> bytes:
        return bytes(self.buf[self.pos:self.pos + n])


def _ms_left(deadline: float | None):
    """Milliseconds to the deadline for poll (None: no deadline; 0: passed)."""
    if deadline is None:
        return None
    left = deadline - time.monotonic()
    return max(1, int(left * 1000)) if left > 0 else 0


# -- writing ---------------------------------------------------------------------------
def write_all(fd: int, buffers, deadline: float | None = None, reader: Reader | None = None,
              max_absorb: int = 64 << 20):
    """Write every buffer to ``fd`` (blocking or not).

    For a non-blocking ``fd``: waits with poll until the deadline, and meanwhile
    absorbs what ``reader`` can read, so that a program which answers early (or
    prints while it reads) cannot deadlock the exchange.
    """
    views = [memoryview(b).cast("B") for b in buffers if len(b)]
    poll = None
    while views:
        try:
            n = os.writev(fd, views[:512])
        except BlockingIOError:
            n = 0
        while n and views:
            if n >= len(views[0]):
                n -= len(views[0])
                views.pop(0)
            else:
                views[0] = views[0][n:]
                n = 0
        if not views:
            return
        if poll is None:
            poll = select.poll()
            poll.register(fd, select.POLLOUT)
            if reader is not None:
                poll.register(reader.fd, select.POLLIN)
                if reader.side is not None:
                    poll.register(reader.side[0], select.POLLIN)
        timeout = _ms_left(deadline)
        if timeout == 0:
            raise WireTimeout("the program stopped reading its stdin before the request was written")
        for fd_ready, ev in poll.poll(timeout):
            if reader is not None and reader.serve_side(fd_ready, poll):
                continue
            if reader is not None and fd_ready == reader.fd:
                if reader.eof or len(reader.buf) > max_absorb:
                    poll.unregister(reader.fd)
                    reader = None
                elif ev & (select.POLLIN | select.POLLHUP):
                    reader.absorb()
            elif ev & (select.POLLERR | select.POLLHUP) and not ev & select.POLLOUT:
                raise BrokenPipeError("the program closed its stdin")
