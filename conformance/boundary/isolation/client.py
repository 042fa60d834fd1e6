"""Process isolation: every adapter call in a worker process.

A worker is forked from a fork server that has already imported the adapter's
library, so replacing a crashed worker does not import torch again. Calls go over a
pipe as small headers; arrays travel through shared-memory arenas (no pickling of
array data). The worker copies its inputs out of the arena, so an adapter that
keeps references sees private arrays as it would in-process; if it writes to its
inputs, the change is copied back into the caller's arrays, so ``call.inputs_untouched``
sees exactly what an in-process call would show.

Failures become the verdicts of the report: an exception in the adapter is
``AdapterRaised`` (error), a dead worker (signal, exit, ``os._exit``) is
``AdapterCrashed`` (crash), a call past ``call_timeout`` is ``AdapterTimeout`` (the
worker is killed and replaced), and a worker whose memory passes ``memory_limit``
is stopped (crash, saying so). What the adapter prints goes to a per-worker file,
never into the channel; ``drain_output()`` returns it.
"""
from __future__ import annotations

import os
import secrets
import signal
import subprocess
import sys
import tempfile
import time

import numpy as np

from .arena import _DIR as _ARENA_DIR
from .arena import Arena, pack, unpack
from ...geometry.capabilities import Capabilities
from ..calls import CallClock, call_signature
from ..contract import Adapter
from ...errors import AdapterCrashed, AdapterLoadError, AdapterRaised, AdapterTimeout, AdapterUnavailable

__all__ = ["load_isolated", "ProcessAdapter", "DEFAULT_MEMORY_LIMIT"]

DEFAULT_MEMORY_LIMIT = 4 << 30
#: words of an allocation refused inside the port (C library, C++ runtime, pthreads)
_OUT_OF_MEMORY = ("Cannot allocate memory", "bad_alloc", "MemoryError", "out of memory")
_NO_FORK = ("jax",)          # libraries that must not be forked once imported


def _forkable(spec: str) -> bool:
    if spec in _NO_FORK:
        return False
    where = spec.rpartition(":")[0]
    if where.endswith(".py") and os.path.isfile(where):
        try:
            text = open(where, encoding="utf-8").read()
        except OSError:
            return True
        return "import jax" not in text and "from jax" not in text
    return "jax" not in where


class _Zygote:
    """The zygote process and its control connection."""

    def __init__(self, owner: "ProcessAdapter"):
        from multiprocessing.connection import Listener
        self.dir = tempfile.mkdtemp(prefix="convwitness-")
        address = os.path.join(self.dir, "control")
        key = secrets.token_bytes(16)
        listener = Listener(address, family="AF_UNIX", authkey=key)
        env = dict(os.environ, CONVWITNESS_ZYGOTE_ADDRESS=address, CONVWITNESS_ZYGOTE_SPEC=owner.spec,
                   CONVWITNESS_ZYGOTE_MEMORY=str(owner.memory_limit), CONVWITNESS_ZYGOTE_KEY=key.hex(),
                   CONVWITNESS_ZYGOTE_FORK="1" if owner.fork else "0")
        out = open(owner.out_path, "ab")
        self.proc = subprocess.Popen([sys.executable, "-m", "convwitness.boundary.isolation.zygote"], env=env,
                                     stdin=subprocess.DEVNULL, stdout=out, stderr=out,
                                     cwd=os.getcwd(), start_new_session=True)
        out.close()
        listener._listener._socket.settimeout(owner.start_timeout)
        try:
            self.conn = listener.accept()
        except OSError:
            self.proc.kill()
            raise AdapterLoadError(f"adapter {owner.spec!r}: the worker did not start within "
                                   f"{owner.start_timeout:.0f} s; output: {owner.drain_output()[-500:]}") from None
        finally:
            listener.close()
        if not self.conn.poll(owner.start_timeout):
            self.close()
            raise AdapterLoadError(f"adapter {owner.spec!r}: loading it in the worker took longer "
                                   f"than {owner.start_timeout:.0f} s")
        try:
            self.hello = self.conn.recv()
        except (EOFError, OSError):
            code = self.proc.wait(5)
            raise AdapterLoadError(f"adapter {owner.spec!r}: the worker died while loading it "
                                   f"({_status(code)}); output: {owner.drain_output()[-500:]}") from None
        if not self.hello.get("ok"):
            self.close()
            msg = self.hello["error"].partition(": ")[2] or self.hello["error"]
            raise (AdapterUnavailable if self.hello.get("unavailable") else AdapterLoadError)(msg)

    def alive(self) -> bool:
        return self.proc.poll() is None

    def fork(self):
        from multiprocessing import reduction
        from multiprocessing.connection import Connection
        self.conn.send({"op": "fork", "runner_pid": os.getpid()})
        pid = self.conn.recv()["pid"]
        fd = reduction.recv_handle(self.conn)
        return pid, Connection(fd)

    def status(self, pid: int, wait: float = 2.0) -> dict:
        try:
            self.conn.send({"op": "status", "pid": pid, "wait": wait})
            return self.conn.recv()
        except (EOFError, OSError):
            return {"exited": True, "code": None}

    def close(self):
        try:
            self.conn.send({"op": "stop"})
        except (OSError, AttributeError):
            pass
        try:
            self.proc.wait(2)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(5)
        try:
            os.rmdir(self.dir)
        except OSError:
            pass


class _Worker:
    """One worker: a forked child of the zygote (or the zygote itself, without fork)."""

    def __init__(self, owner: "ProcessAdapter"):
        self.owner = owner
        z = owner.zygote
        if owner.fork:
            self.pid, self.conn = z.fork()
        else:
            self.pid, self.conn = z.proc.pid, z.conn
        self.reply_names = set()

    def alive(self) -> bool:
        if not self.owner.fork:
            return self.owner.zygote.alive()
        try:
            os.kill(self.pid, 0)
        except OSError:
            return False
        st = self.owner.zygote.status(self.pid, 0.0)
        return not st["exited"]

    def exit_code(self):
        if not self.owner.fork:
            try:
                return self.owner.zygote.proc.wait(2)
            except subprocess.TimeoutExpired:
                return None
        return self.owner.zygote.status(self.pid, 2.0)["code"]

    def kill(self):
        try:
            os.kill(self.pid, signal.SIGKILL)
        except OSError:
            pass
        code = self.exit_code()
        import glob
        for name in set(self.reply_names) | set(glob.glob(os.path.join(_ARENA_DIR, f"convwitness-*-{self.pid}-*"))):
            Arena.remove(name)
        if self.owner.fork:
            self.conn.close()
        return code


class ProcessAdapter:
    """Client side of an isolated adapter (used through contract.Adapter)."""

    def __init__(self, spec: str, *, call_timeout: float = 60.0, memory_limit: int | None = DEFAULT_MEMORY_LIMIT,
                 start_timeout: float = 300.0, first_call_allowance: float = 1.0):
        self.spec = spec
        self.call_timeout = float(call_timeout)
        # the call clock (see boundary/calls.py): a new call signature may take
        # first_call_allowance x call_timeout (ports that compile per shape); a call that
        # hung once is never run again; probes run under a tighter limit
        self.clock = CallClock(self.call_timeout, first_call_allowance)
        self.memory_limit = int(memory_limit) if memory_limit else 0
        self.start_timeout = start_timeout
        self.fork = _forkable(spec)
        fd, self.out_path = tempfile.mkstemp(prefix="convwitness-out-", suffix=".log")
        os.close(fd)
        self._out_pos = 0
        self.arena = Arena.create(prefix="req")
        self._reply_arenas: dict = {}
        self.worker = None
        self.zygote = None
        self.restarts = -1
        hello = self._start()
        self.name = hello["name"]
        self.version = hello["version"]
        self.capabilities = Capabilities.from_dict(hello["capabilities"])
        passes = self.capabilities.passes
        caps = self.capabilities
        if "forward" in passes or "forward" in caps.unclaimed_passes or "quantized" not in passes:
            self.forward = self._proxy("forward")
        if "quantized" in passes:
            self.quantized = self._proxy("quantized")
        if "backward" in passes:
            self.backward = self._proxy("backward")
        if "transposed" in passes:
            self.transposed = self._proxy("transposed")

    # -- worker lifecycle ------------------------------------------------------------
    def _start(self) -> dict:
        """(Re)start the worker; a fresh zygote only when there is none alive."""
        self.restarts += 1
        if self.zygote is None or not self.zygote.alive():
            self.zygote = _Zygote(self)
        self.worker = _Worker(self)
        return self.zygote.hello

    def _ensure(self):
        if self.worker is None:
            self._start()

    def close(self):
        if self.worker is not None and self.fork:
            try:
                self.worker.conn.send({"op": "stop"})
            except OSError:
                pass
            self.worker.kill()
        self.worker = None
        if self.zygote is not None:
            self.zygote.close()
            self.zygote = None
        self.arena.unlink()
        for a in self._reply_arenas.values():
            a.close()
        self._reply_arenas.clear()
        try:
            os.unlink(self.out_path)
        except OSError:
            pass

    def __del__(self):  # pragma: no cover - best effort
        try:
            self.close()
        except Exception:
            pass

    def drain_output(self) -> str:
        """What the adapter printed since the last drain."""
        try:
            with open(self.out_path, "rb") as fh:
                fh.seek(self._out_pos)
                data = fh.read()
        except OSError:
            return ""
        self._out_pos += len(data)
        return data.decode("utf-8", "replace")

    # -- calls -------------------------------------------------------------------------
    def _proxy(self, op: str):
        def call(*args, **kwargs):
            return self._call(op, args, kwargs)
        call.__name__ = op
        return call

    def _call(self, op, args, kwargs):
        sig = call_signature(op, args, kwargs)
        limit = self.clock.limit(sig)          # raises AdapterTimeout for a known hang
        self._ensure()
        header = pack(self.arena, list(args))
        w = self.worker
        try:
            w.conn.send({"op": op, "arrays": header, "arena": self.arena.name,
                         "arena_size": self.arena.size, "kwargs": kwargs})
        except (BrokenPipeError, OSError):
            return self._crashed(op)
        t_start = time.monotonic()
        deadline = t_start + limit
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                if w.conn.poll(0):          # the answer came just at the deadline: take it
                    break
                if self.memory_limit and _rss(w.pid) > self.memory_limit:
                    # out of time while over its memory limit: the verdict is the memory,
                    # whichever of the two a loaded machine let come first
                    self._drop()
                    raise AdapterCrashed(f"adapter {self.name} {op}: the worker passed the memory "
                                         f"limit of {self.memory_limit / 2**30:.2f} GiB "
                                         "(--memory-limit) and was stopped at the call timeout",
                                         self.drain_output())
                self._drop()
                raise AdapterTimeout(self.clock.hung(sig, f"adapter {self.name} {op}", limit),
                                     self.drain_output())
            if w.conn.poll(min(left, 0.05)):
                break
            if self.memory_limit and _rss(w.pid) > self.memory_limit:
                self._drop()
                raise AdapterCrashed(f"adapter {self.name} {op}: the worker passed the memory limit "
                                     f"of {self.memory_limit / 2**30:.2f} GiB (--memory-limit) and was "
                                     "stopped", self.drain_output())
        try:
            msg = w.conn.recv()
        except (EOFError, OSError):
            return self._crashed(op)
        self.clock.answered(sig, time.monotonic() - t_start)
        if "memory" in msg:
            raise AdapterCrashed(f"adapter {self.name} {op}: stopped at the memory limit of "
                                 f"{self.memory_limit / 2**30:.2f} GiB (--memory-limit): {msg['memory']}",
                                 self.drain_output())
        if "raised" in msg:
            hint = ""
            if self.memory_limit and any(t in msg["raised"] for t in _OUT_OF_MEMORY):
                hint = (f" (the worker runs under a memory limit of {self.memory_limit / 2**30:.2f} GiB, "
                        "thread stacks included: if the port needs more, raise --memory-limit)")
            raise AdapterRaised(f"adapter {self.name} {op} raised {msg['raised']}{hint}", msg["traceback"],
                                self.drain_output())
        arena = self._reply_arenas.get(msg["arena"])
        if arena is None or arena.size < msg["arena_size"]:
            arena = self._reply_arenas[msg["arena"]] = Arena.attach(msg["arena"], msg["arena_size"])
            w.reply_names.add(msg["arena"])
        items = unpack(arena, msg["result"], copy=True)
        n_out = len(items) - len(msg["mutated"])
        for i, value in zip(msg["mutated"], items[n_out:]):
            np.copyto(args[i], value)          # the adapter wrote to this input
        out = [self._same_sharing(v, a, args) for v, a in zip(items[:n_out], msg["aliases"])]
        self._last_outputs = [v for v in out if isinstance(v, np.ndarray)]
        if msg["tuple"]:
            return tuple(out) if msg["tuple_type"] == "tuple" else list(out)
        return out[0]

    def _same_sharing(self, value, alias, args):
        """Give an output the memory sharing it had in the worker (an input, or an earlier
        output), so the contract checks see exactly what an in-process call shows."""
        if alias is None:
            return value
        if alias[0] == "input":
            _, i, offset, strides = alias
            base = args[i]
            if isinstance(base, np.ndarray) and 0 <= offset < max(base.nbytes, 1):
                try:
                    return np.ndarray(value.shape, value.dtype, buffer=base, offset=offset,
                                      strides=tuple(strides))
                except (TypeError, ValueError):
                    return value
            return value
        k = alias[1]
        prev = getattr(self, "_last_outputs", [])
        if k < len(prev) and prev[k].shape == value.shape and prev[k].dtype == value.dtype:
            np.copyto(prev[k], value)
            return prev[k]
        return value

    def _drop(self):
        """Kill the current worker; the next call starts another."""
        code = self.worker.kill()
        self.worker = None
        if not self.fork:
            self.zygote = None
        return code

    def _crashed(self, op):
        code = self._drop()
        raise AdapterCrashed(f"adapter {self.name} {op}: the worker process died ({_status(code)}); "
                             "it will be replaced for the next call", self.drain_output())


def _status(code) -> str:
    if code is None:
        return "still running"
    if code < 0:
        try:
            return f"killed by signal {signal.Signals(-code).name}"
        except ValueError:
            return f"killed by signal {-code}"
    return f"exit code {code}"


def _rss(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/statm") as fh:
            return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        return 0


def load_isolated(spec: str, *, isolation: str = "process", call_timeout: float | None = None,
                  memory_limit: int | None = None, first_call_allowance: float = 1.0) -> Adapter:
    """An Adapter whose calls run in a worker process (``isolation="process"``) or in
    this process (``"none"``). ``exec:`` programs are already separate processes."""
    from ..loading import load_adapter
    if isolation not in ("process", "none"):
        raise AdapterLoadError(f"--isolation {isolation!r}: expected 'process' or 'none'")
    if isinstance(spec, str) and spec.startswith("exec:"):
        opts = {"call_timeout": call_timeout or 60.0}
        if memory_limit is not None or isolation == "process":
            opts["memory_limit"] = DEFAULT_MEMORY_LIMIT if memory_limit is None else memory_limit
        adapter = load_adapter(spec, **opts)
        for name in ("drain_output", "close"):
            if hasattr(adapter.target, name):
                setattr(adapter, name, getattr(adapter.target, name))
        return adapter
    if isolation == "none":
        return load_adapter(spec)
    target = ProcessAdapter(spec, call_timeout=call_timeout or 60.0,
                            memory_limit=DEFAULT_MEMORY_LIMIT if memory_limit is None else memory_limit,
                            first_call_allowance=first_call_allowance)
    adapter = Adapter(target, source=spec)
    adapter.drain_output = target.drain_output
    adapter.close = target.close
    return adapter
