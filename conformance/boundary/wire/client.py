"""``exec:`` adapters: a foreign program that speaks cwire/1 on its stdin/stdout.

:class:`ExecAdapter` starts the program once, reads its hello (name, version,
capabilities), and sends it one request per call; the program is reused until it
crashes, hangs or breaks the protocol, and is then started afresh for the next call.
Its stdout is the protocol channel only; its stderr is kept (``drain_output()``) and
attached to every error. Failures map onto the adapter errors of the runner:

* the program exits or dies mid-call (a short read, a closed pipe) -> AdapterCrashed
  with the exit status or signal;
* no reply within ``call_timeout`` seconds -> AdapterTimeout, the program is killed;
* an error reply -> AdapterRaised with the program's message (AdapterOutputError
  when it says ``"kind": "output"``);
* garbage, a wrong header, an array of the wrong size -> AdapterOutputError naming
  the byte offset or the field.

The protocol is documented in docs/wire-protocol.md; the codec is
:mod:`convwitness.boundary.wire.codec`.
"""
from __future__ import annotations

import fcntl
import os
import shlex
import signal
import subprocess
import time
import weakref

import numpy as np

from ...geometry.capabilities import Capabilities
from ...errors import (AdapterCrashed, AdapterLoadError, AdapterOutputError, AdapterRaised,
                       AdapterTimeout)
from ..limits import parse_bytes
from .codec import (Reader, Region, WireEOF, WireFormatError, WireTimeout, encode,
                    read_message, write_all)
from .messages import _Failure, check_hello, check_reply
from .messages import output_bytes as _output_bytes, params as _params, quant_params

__all__ = ["ExecAdapter"]

_PIPE_SIZE = 1 << 20          # F_SETPIPE_SZ: fewer wake-ups for large inline arrays
_F_SETPIPE_SZ = 1031


class _State:
    """What the finalizer needs: the process and the region, not the adapter."""

    def __init__(self):
        self.proc = None
        self.region = None

    def stop(self, grace: float = 0.0):
        proc, self.proc = self.proc, None
        if proc is not None:
            for f in (proc.stdin, proc.stdout):
                try:
                    f.close()
                except OSError:
                    pass
            try:
                proc.wait(grace) if grace else None
            except subprocess.TimeoutExpired:
                pass
            if proc.poll() is None:
                try:
                    os.killpg(proc.pid, signal.SIGKILL)
                except (ProcessLookupError, PermissionError):
                    proc.kill()
                proc.wait()
            if proc.stderr is not None:
                proc.stderr.close()
        region, self.region = self.region, None
        if region is not None:
            region.close()


class ExecAdapter:
    """The adapter object behind ``exec:COMMAND ARGS...`` (wrap it with contract.wrap).

    Options: ``call_timeout`` (seconds per call, default 60), ``start_timeout``
    (seconds for the hello, default 60), ``memory_limit`` (bytes or '4GiB': an
    address-space limit of the program), ``shared_memory`` (use the region carrier when
    the program offers it, default True), ``env``, ``cwd``. ``isolation`` is accepted
    and ignored: an exec adapter always runs in its own process.
    """

    def __init__(self, command: str, *, call_timeout: float = 60.0, start_timeout: float = 60.0,
                 memory_limit=None, shared_memory: bool = True, env: dict | None = None,
                 cwd: str | None = None, isolation=None, max_output: int = 1 << 20,
                 region_limit: int = 8 << 30):
        try:
            self.argv = shlex.split(command) if isinstance(command, str) else list(command)
        except ValueError as exc:
            raise AdapterLoadError(f"exec:{command}: cannot split the command line ({exc}); "
                                   "quote arguments as in a POSIX shell") from None
        if not self.argv:
            raise AdapterLoadError("exec: needs a command, e.g. exec:./convport or "
                                   "exec:python -m convwitness.serve reference")
        for name, v in (("call_timeout", call_timeout), ("start_timeout", start_timeout)):
            if not isinstance(v, (int, float)) or isinstance(v, bool) or v <= 0:
                raise AdapterLoadError(f"exec: {name}={v!r} must be a positive number of seconds")
        self.command = command if isinstance(command, str) else shlex.join(command)
        self.call_timeout, self.start_timeout = float(call_timeout), float(start_timeout)
        try:
            self.memory_limit = parse_bytes(memory_limit)
        except ValueError as exc:
            raise AdapterLoadError(f"memory_limit={exc}") from None
        self.shared_memory, self.env, self.cwd = shared_memory, env, cwd
        self.max_output, self.region_limit = max_output, region_limit
        self._state = _State()
        self._finalizer = weakref.finalize(self, self._state.stop)
        self._stderr = bytearray()
        self._dropped = 0
        self._ids = 0
        self.starts = 0
        self.hello: dict = {}
        try:
            self._start()
        except _Failure as exc:
            raise AdapterLoadError(f"exec:{self.command}: {exc}{self._tail()}") from None
        self.name = self.hello["name"]
        self.version = self.hello["version"]
        self.capabilities = self._caps
        self._offer_quantized()

    def _offer_quantized(self):
        """A program whose hello names the quantized pass gets ``quantized()``, and only
        the float passes its hello names (as a Python object offering those methods)."""
        named = self._caps.claimed_passes | self._caps.unclaimed_passes
        if "quantized" in named:
            self.quantized = self._quantized
            for method in ("forward", "backward", "transposed"):
                if method not in named:
                    setattr(self, method, None)

    # -- the program ---------------------------------------------------------------------
    def _limits(self):
        import resource
        resource.setrlimit(resource.RLIMIT_AS, (self.memory_limit, self.memory_limit))

    def _start(self):
        """Start the program and take its hello (and set up the region)."""
        try:
            proc = subprocess.Popen(
                self.argv, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                bufsize=0, start_new_session=True, env=self.env, cwd=self.cwd,
                preexec_fn=self._limits if self.memory_limit else None)
        except OSError as exc:
            raise _Failure(AdapterCrashed, f"cannot start {self.argv[0]!r}: {exc.strerror or exc}; "
                                           "fix: give the path of an executable") from None
        self._state.proc, self.starts = proc, self.starts + 1
        self._in, self._out, self._err = proc.stdin.fileno(), proc.stdout.fileno(), proc.stderr.fileno()
        for fd in (self._in, self._out):
            try:
                fcntl.fcntl(fd, _F_SETPIPE_SZ, _PIPE_SIZE)
            except OSError:
                pass
            os.set_blocking(fd, False)
        os.set_blocking(self._err, False)
        self._reader = Reader(self._out, f"program {os.path.basename(self.argv[0])!r}",
                              side=(self._err, self._read_stderr))
        hello = self._exchange(None, "the hello", self.start_timeout)[0]
        caps = self._check_hello(hello)
        if self.hello and (hello["name"], hello["version"], caps) != \
                (self.hello["name"], self.hello["version"], self._caps):
            raise _Failure(AdapterOutputError, "after a restart the program declared another "
                           f"name, version or capabilities than at first ({hello['name']} "
                           f"{hello['version']}); a port must declare the same every time")
        self.hello, self._caps = hello, caps
        if self.shared_memory and "region" in hello.get("carriers", []):
            self._setup_region()

    def _check_hello(self, h: dict) -> Capabilities:
        return check_hello(h)

    def _setup_region(self):
        region = Region.create(1 << 20)
        self._state.region = region
        reply = self._exchange({"type": "region", "path": region.path, "size": region.size},
                               "the region set-up", self.start_timeout)[0]
        region.unlink()     # both sides hold it open; nothing is left behind
        if reply.get("type") != "region-ok":
            self._state.region = None
            region.close()

    def _read_stderr(self) -> bool:
        """Keep what the program writes on stderr (the last ``max_output`` bytes)."""
        while True:
            try:
                chunk = os.read(self._err, 1 << 16)
            except BlockingIOError:
                return True
            except (OSError, ValueError):
                return False
            if not chunk:
                return False
            self._stderr += chunk
            over = len(self._stderr) - self.max_output
            if over > 0:
                del self._stderr[:over]
                self._dropped += over

    def drain_output(self) -> str:
        """What the program wrote on stderr since the last drain (decoded, replacing errors)."""
        if self._state.proc is not None:
            self._read_stderr()
        text = self._stderr.decode("utf-8", "replace")
        if self._dropped:
            text = f"[... {self._dropped} earlier bytes of stderr dropped]\n" + text
        self._stderr.clear()
        self._dropped = 0
        return text

    def _tail(self) -> str:
        text = self.drain_output().strip()
        if not text:
            return ""
        last = text.splitlines()[-1]
        return f" (its stderr ends: {last[:200]!r})"

    def _status(self, wait: float) -> str:
        proc = self._state.proc
        if proc is None:
            return "stopped"
        try:
            rc = proc.wait(wait)
        except subprocess.TimeoutExpired:
            return "still running (it was killed)"
        if rc < 0:
            try:
                sig = signal.Signals(-rc).name
            except ValueError:
                sig = f"signal {-rc}"
            return f"killed by {sig} ({-rc})"
        return f"exited with status {rc}"

    def _exchange(self, request, what: str, timeout: float, arrays=(), region=None):
        """Send one message (None: send nothing) and read the reply; _Failure on any fault.

        With ``region``, large arrays travel in it and the reply may use its free part.
        """
        deadline = time.monotonic() + timeout
        reader = self._reader
        try:
            free = 0
            if request is not None:
                bufs, free = encode(request, arrays, region)
                write_all(self._in, bufs, deadline, reader)
            reader.deadline = deadline
            return read_message(reader, region, region_free=free)
        except WireTimeout as exc:
            self._state.stop()
            if request is None:          # the hello: the program never introduced itself
                raise _Failure(AdapterTimeout, (
                    f"the program sent no complete hello within {timeout:g} s ({exc}); it was "
                    "killed. Check that it writes its hello to stdout at start (before reading "
                    "anything), flushes stdout, and does not print anything else there; see "
                    "docs/wire-protocol.md")) from None
            raise _Failure(AdapterTimeout, f"no complete reply to {what} within {timeout:g} s: "
                           f"{exc}; the program was killed and is restarted for the next "
                           "call") from None
        except (WireEOF, BrokenPipeError) as exc:
            status = self._status(2.0)
            self._read_stderr()
            self._state.stop()
            text = str(exc) if isinstance(exc, WireEOF) else \
                f"the program closed its stdin while {what} was being sent"
            raise _Failure(AdapterCrashed, f"program {status} during {what}: {text}") from None
        except WireFormatError as exc:
            self._state.stop()
            raise _Failure(AdapterOutputError, f"protocol violation in the reply to {what}: {exc}; "
                           "the program was stopped and is restarted for the next call") from None

    def close(self):
        """Close the program's stdin (it exits at end of file) and reap it."""
        self._state.stop(grace=2.0)

    def __repr__(self) -> str:
        return f"<ExecAdapter {getattr(self, 'name', '?')} exec:{self.command}>"

    # -- calls ------------------------------------------------------------------------
    def _region_for(self, method, arrays, params):
        """The region, grown for this call, or None when this call goes inline."""
        region = self._state.region
        if region is None:
            return None
        big = sum(a.nbytes + 64 for _, a in arrays if a.nbytes >= region.threshold)
        out = _output_bytes(method, dict(arrays), params)
        need = big + out + 256
        if need > self.region_limit:
            return None
        region.ensure(need)
        return region

    def _call(self, method: str, arrays: list, params: dict) -> dict:
        arrays = [(n, np.asarray(a)) for n, a in arrays if a is not None]
        label = f"adapter {getattr(self, 'name', self.command)} {method}"
        try:
            if self._state.proc is None:
                try:
                    self._start()
                except _Failure as exc:
                    raise _Failure(exc.cls, f"restarting the program: {exc}") from None
            self._ids += 1
            request = {"type": "call", "id": self._ids, "method": method, "params": params}
            reply, out, no = self._exchange(request, f"call {self._ids} ({method})",
                                            self.call_timeout, arrays,
                                            self._region_for(method, arrays, params))
            return self._check_reply(reply, out, no, method)
        except _Failure as exc:
            if exc.cls is AdapterRaised:
                raise AdapterRaised(f"{label}: {exc}", exc.traceback_text,
                                    output=self.drain_output()) from None
            if exc.cls is AdapterOutputError:
                raise AdapterOutputError(f"{label}: {exc}{self._tail()}") from None
            raise exc.cls(f"{label}: {exc}", output=self.drain_output()) from None

    def _check_reply(self, reply: dict, out: dict, no: int, method: str) -> dict:
        return check_reply(reply, out, no, method, self._ids, self._state.stop)

    def forward(self, x, w, b=None, *, stride, padding, dilation, groups, layout="channels_first"):
        p = _params(stride, padding, dilation, groups, layout, None)
        return self._call("forward", [("x", x), ("w", w), ("b", b)], p)["y"]

    def backward(self, x, w, b, grad_y, *, stride, padding, dilation, groups,
                 layout="channels_first"):
        p = _params(stride, padding, dilation, groups, layout, None)
        out = self._call("backward", [("x", x), ("w", w), ("b", b), ("grad_y", grad_y)], p)
        return out["grad_x"], out["grad_w"], out.get("grad_b")

    def transposed(self, x, w, b=None, *, stride, padding, dilation, groups, output_padding,
                   layout="channels_first"):
        p = _params(stride, padding, dilation, groups, layout, output_padding)
        return self._call("transposed", [("x", x), ("w", w), ("b", b)], p)["y"]

    def _quantized(self, x, w, b=None, *, stride, padding, dilation, groups, layout="channels_first",
                   output_padding=None, transposed=False, **quant):
        """The quantized pass (offered as ``quantized`` when the hello claims it): the
        keywords of boundary/contract.py ``quant_kwargs`` travel in ``params["quant"]``."""
        p = quant_params(_params(stride, padding, dilation, groups, layout, output_padding), quant, b,
                         transposed)
        return self._call("quantized", [("x", x), ("w", w), ("b", b)], p)["y"]
