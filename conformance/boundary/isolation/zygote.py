"""The worker side of process isolation (run as ``python -m convwitness.boundary.isolation.zygote``).

The zygote imports the adapter's library and loads the adapter once, then forks a
worker per request of the runner; a crashed worker is replaced by another fork, so
the library is never imported twice. (Libraries that must not be forked, such as
jax, are served by the zygote itself instead; a crash then costs a fresh zygote.)
Each worker gets its own socket, passed to the runner as a file descriptor over the
control connection. Everything the adapter prints goes to the output file the
runner gave as stdout/stderr, never into a channel.
"""
from __future__ import annotations

import os
import signal
import socket
import sys
import traceback

import numpy as np

from .arena import Arena, copy_keeping_strides, pack, unpack

__all__ = ["serve", "main"]


def serve(conn, adapter, memory_limit: int = 0):
    """Answer calls on ``conn`` until it closes or says stop."""
    if memory_limit:
        try:
            import resource
            resource.setrlimit(resource.RLIMIT_DATA, (memory_limit, memory_limit))
        except (ImportError, ValueError, OSError):
            pass
    arenas = {}
    reply = Arena.create(prefix="reply")
    methods = {"forward": adapter._forward, "backward": adapter._backward,
               "transposed": adapter._transposed, "quantized": adapter._quantized}
    last_outputs: list = []
    try:
        while True:
            try:
                msg = conn.recv()
            except (EOFError, OSError):
                return
            if msg.get("op") == "stop":
                return
            arena = arenas.get(msg["arena"])
            if arena is None or arena.size < msg["arena_size"]:
                if arena is not None:
                    arena.close()
                arena = arenas[msg["arena"]] = Arena.attach(msg["arena"], msg["arena_size"])
            shared = unpack(arena, msg["arrays"], copy=False)    # the caller's bytes, untouched
            args = [copy_keeping_strides(a) if isinstance(a, np.ndarray) else a for a in shared]
            try:
                out = methods[msg["op"]](*args, **msg["kwargs"])
            except MemoryError as exc:
                conn.send({"memory": f"MemoryError: {exc}"})
                continue
            except Exception as exc:  # noqa: BLE001 - the adapter's own failure
                conn.send({"raised": f"{type(exc).__name__}: {exc}",
                           "traceback": "".join(traceback.format_exception(type(exc), exc,
                                                                           exc.__traceback__))})
                continue
            finally:
                sys.stdout.flush()
                sys.stderr.flush()
            mutated = [i for i, a in enumerate(shared)
                       if isinstance(a, np.ndarray) and not _same_bytes(a, args[i])]
            is_tuple = msg["op"] == "backward" and isinstance(out, (tuple, list))
            items = list(out) if is_tuple else [out]
            aliases = [_alias(item, args, last_outputs) for item in items]
            last_outputs = [item for item in items if isinstance(item, np.ndarray)]
            header = pack(reply, items + [args[i] for i in mutated])
            conn.send({"result": header, "arena": reply.name, "arena_size": reply.size,
                       "tuple": is_tuple, "tuple_type": type(out).__name__, "mutated": mutated,
                       "aliases": aliases})
    finally:
        reply.unlink()


def _alias(item, args, last_outputs):
    """How an output shares memory: with input i (at a byte offset, with strides), with
    output k of the previous call, or not at all (None)."""
    if not isinstance(item, np.ndarray):
        return None
    for i, a in enumerate(args):
        if isinstance(a, np.ndarray) and np.shares_memory(item, a):
            offset = item.__array_interface__["data"][0] - a.__array_interface__["data"][0]
            return ("input", i, int(offset), list(item.strides))
    for k, prev in enumerate(last_outputs):
        if np.shares_memory(item, prev):
            return ("previous", k)
    return None


def _same_bytes(a: np.ndarray, b) -> bool:
    if not isinstance(b, np.ndarray) or a.shape != b.shape or a.dtype != b.dtype:
        return False
    a1 = np.ascontiguousarray(a).reshape(-1).view(np.uint8)
    b1 = np.ascontiguousarray(b).reshape(-1).view(np.uint8)
    if a1.size % 8 == 0:
        a1, b1 = a1.view(np.uint64), b1.view(np.uint64)
    return bool(np.array_equal(a1, b1))


def _hello(adapter) -> dict:
    return {"ok": True, "name": adapter.name, "version": adapter.version,
            "capabilities": adapter.capabilities.to_dict(), "pid": os.getpid()}


def _die_with_parent():
    """Linux: get SIGKILL when the parent dies, so no worker outlives a killed run."""
    try:
        import ctypes
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, signal.SIGKILL)          # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


def main():
    from multiprocessing.connection import Client, Connection
    parent = os.getppid()
    _die_with_parent()
    if os.getppid() != parent:                 # the runner is already gone
        return
    from multiprocessing import reduction
    address, spec = os.environ["CONVWITNESS_ZYGOTE_ADDRESS"], os.environ["CONVWITNESS_ZYGOTE_SPEC"]
    memory_limit = int(os.environ.get("CONVWITNESS_ZYGOTE_MEMORY", "0"))
    fork = os.environ.get("CONVWITNESS_ZYGOTE_FORK", "1") == "1"
    authkey = bytes.fromhex(os.environ["CONVWITNESS_ZYGOTE_KEY"])
    control = Client(address, family="AF_UNIX", authkey=authkey)
    from ..loading import load_adapter
    try:
        adapter = load_adapter(spec)
    except Exception as exc:  # noqa: BLE001 - reported as one line
        control.send({"ok": False, "error": f"{type(exc).__name__}: {exc}",
                      "unavailable": type(exc).__name__ == "AdapterUnavailable"})
        return
    control.send(_hello(adapter))
    if not fork:
        serve(control, adapter, memory_limit)
        return
    while True:
        try:
            msg = control.recv()
        except (EOFError, OSError):
            return
        op = msg.get("op")
        if op == "fork":
            mine, theirs = socket.socketpair()
            pid = os.fork()
            if pid == 0:                       # the worker
                code = 0
                try:
                    _die_with_parent()
                    control.close()
                    theirs.close()
                    conn = Connection(os.dup(mine.fileno()))
                    mine.close()
                    serve(conn, adapter, memory_limit)
                except BaseException:          # noqa: BLE001 - report, then leave
                    traceback.print_exc()
                    code = 70
                finally:
                    sys.stdout.flush()
                    sys.stderr.flush()
                    os._exit(code)
            mine.close()
            control.send({"pid": pid})
            reduction.send_handle(control, theirs.fileno(), msg["runner_pid"])
            theirs.close()
        elif op == "status":
            control.send(_status(msg["pid"], msg.get("wait", 0.0)))
        elif op == "stop":
            return


def _status(pid: int, wait: float) -> dict:
    import time
    deadline = time.monotonic() + wait
    while True:
        try:
            done, status = os.waitpid(pid, os.WNOHANG)
        except ChildProcessError:
            return {"exited": True, "code": None}
        if done:
            if os.WIFSIGNALED(status):
                return {"exited": True, "code": -os.WTERMSIG(status)}
            return {"exited": True, "code": os.WEXITSTATUS(status)}
        if time.monotonic() >= deadline:
            return {"exited": False, "code": None}
        time.sleep(0.01)


if __name__ == "__main__":
    main()
