"""The cwire/1 protocol: codec, serve helper and the client's handling of faults.

Outside sources: the byte layout of the arrays is IEEE 754-2019's binary16/32/64
interchange formats, little-endian, and numpy's own dtype names and C order; the
framing is checked against an independent implementation written here with
:mod:`struct` and :mod:`json` only (the broken programs below), and against the
documented byte-level example in docs/wire-protocol.md.
"""
from __future__ import annotations

import json
import os
import sys
import time

import numpy as np
import pytest

from convwitness import ConvSpec
from convwitness.adapters.reference import ReferenceAdapter
from convwitness.boundary.contract import wrap
from convwitness.errors import (AdapterCrashed, AdapterLoadError, AdapterOutputError,
                                AdapterRaised, AdapterTimeout)
from convwitness.boundary.loading import load_adapter
from convwitness.boundary.wire.client import ExecAdapter
from convwitness.boundary.wire.codec import (MAGIC, Reader, Region, WireEOF, WireFormatError, encode,
                                    read_message)

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
PY = sys.executable
KW1 = {"stride": (1,), "padding": ((0, 0),), "dilation": (1,), "groups": 1}


def _roundtrip(tmp_path, arrays, region=None):
    bufs, _ = encode({"type": "result", "id": 1}, arrays, region)
    path = tmp_path / "msg.bin"
    path.write_bytes(b"".join(bytes(b) for b in bufs))
    fd = os.open(path, os.O_RDONLY)
    try:
        return read_message(Reader(fd), region)
    finally:
        os.close(fd)


def _dtypes():
    names = ["float16", "float32", "float64", "int8", "int16", "int32", "int64", "uint8",
             "uint16", "uint32", "uint64", "bool", "complex64", "complex128"]
    try:
        import ml_dtypes  # noqa: F401
        names += ["bfloat16", "float8_e4m3fn", "float8_e5m2"]
    except ImportError:
        pass
    return names


SHAPES = [(), (0,), (3, 0, 2), (5,), (2, 3, 4), (2, 3, 9, 7), (1, 1, 2, 2, 3)]


@pytest.mark.parametrize("dtype", _dtypes())
def test_codec_round_trip_every_dtype_and_shape(tmp_path, dtype):
    # numpy dtype names and C order (numpy's documented array layout); values survive
    # bit for bit, zero-size arrays included.
    from convwitness.boundary.wire.codec import dtype_of
    dt = dtype_of(dtype)
    rng = np.random.default_rng(0)
    arrays = []
    for i, shape in enumerate(SHAPES):
        raw = rng.integers(0, 256, size=int(np.prod(shape)) * dt.itemsize, dtype=np.uint8)
        arrays.append((f"a{i}", raw.view(dt).reshape(shape)))
    header, got, no = _roundtrip(tmp_path, arrays)
    assert no == 1 and header["type"] == "result"
    for (name, a), d in zip(arrays, header["arrays"]):
        b = got[name]
        assert b.dtype == a.dtype and b.shape == a.shape
        assert b.tobytes() == a.tobytes()
        assert d["nbytes"] == a.size * dt.itemsize


def test_codec_little_endian_and_views(tmp_path):
    # IEEE 754-2019 binary64 1.5 is 0x3FF8000000000000; on the wire it is little-endian
    # whatever the byte order of the array given.
    big = np.array([1.5, -2.0], dtype=">f8")
    view = np.arange(12.0).reshape(3, 4).T          # not contiguous
    bufs, _ = encode({"type": "call"}, [("big", big), ("view", view)])
    payload = b"".join(bytes(b) for b in bufs[2:])
    assert payload[:8] == bytes.fromhex("000000000000f83f")
    header, got, _ = _roundtrip(tmp_path, [("big", big), ("view", view)])
    np.testing.assert_array_equal(got["big"], [1.5, -2.0])
    np.testing.assert_array_equal(got["view"], view)


def test_codec_region_round_trip(tmp_path):
    region = Region.create(1 << 20, threshold=1024)
    try:
        a = np.arange(4096, dtype=np.float32).reshape(64, 64)
        small = np.arange(3.0)
        header, got, _ = _roundtrip(tmp_path, [("a", a), ("s", small)], region)
        assert header["arrays"][0]["offset"] == 0 and "offset" not in header["arrays"][1]
        assert header["region_free"] >= a.nbytes and header["region_free"] % 64 == 0
        np.testing.assert_array_equal(got["a"], a)
        np.testing.assert_array_equal(got["s"], small)
    finally:
        region.close()


def _hex_block(doc: str, label: str) -> bytes:
    block = doc.split(f"<!-- cwire-example: {label} -->")[1].split("```text\n")[1].split("```")[0]
    return bytes.fromhex("".join(line[6:53] for line in block.splitlines()))


def test_documented_byte_example_is_what_the_codec_writes():
    with open(os.path.join(ROOT, "docs", "wire-protocol.md"), encoding="utf-8") as f:
        doc = f.read()
    x = np.array([[[1, 2, 3]]], np.float32)
    w = np.array([[[1, -1]]], np.float32)
    params = {"stride": [1], "padding": [[0, 0]], "dilation": [1], "groups": 1,
              "layout": "channels_first", "output_padding": [0]}
    req = encode({"type": "call", "id": 1, "method": "forward", "params": params},
                 [("x", x), ("w", w)])[0]
    assert b"".join(bytes(b) for b in req) == _hex_block(doc, "request")
    # y = [1*1 + 2*(-1), 2*1 + 3*(-1)]: cross-correlation, no flip (common practice, no source)
    rep = encode({"type": "result", "id": 1}, [("y", np.array([[[-1, -1]]], np.float32))])[0]
    assert b"".join(bytes(b) for b in rep) == _hex_block(doc, "reply")


def test_reader_names_garbage_and_short_messages(tmp_path):
    path = tmp_path / "g.bin"
    path.write_bytes(b"Hello, world\n" + MAGIC)
    fd = os.open(path, os.O_RDONLY)
    with pytest.raises(WireFormatError, match=r"expected magic b'CW/1' at byte 0 of message 1 "
                                              r"\(stream byte 0\), got b'Hell'"):
        read_message(Reader(fd))
    os.close(fd)
    bufs, _ = encode({"type": "result", "id": 1}, [("y", np.ones(4))])
    whole = b"".join(bytes(b) for b in bufs)
    path.write_bytes(whole[:-5])
    fd = os.open(path, os.O_RDONLY)
    with pytest.raises(WireEOF, match=rf"ended at byte {len(whole) - 5} of the message.*5 byte\(s\) "
                                      r"short of array 'y'") as info:
        read_message(Reader(fd))
    assert not info.value.at_boundary
    os.close(fd)


# -- the serve helper -----------------------------------------------------------------
SPECS = [
    ConvSpec(2, 3, 4, (9, 7), (3, 2), stride=(2, 1), padding=((1, 0), (0, 2)), dilation=(1, 2),
             dtype="float64"),
    ConvSpec(1, 4, 6, (11,), (3,), stride=3, padding=((2, 1),), groups=2, dtype="float32"),
    ConvSpec(2, 2, 4, (4, 3, 5), (2, 2, 3), stride=(1, 2, 2), padding=((1, 1), (0, 1), (-1, 0)),
             bias=False, dtype="float64"),
    ConvSpec(0, 2, 2, (5, 5), (3, 3), dtype="float32"),
    ConvSpec(2, 3, 4, (6, 5), (3, 3), padding=1, dtype="float32", layout="channels_last"),
    ConvSpec(8, 16, 16, (40, 40), (3, 3), padding=1, dtype="float32"),   # region carrier
]
TSPECS = [ConvSpec(2, 4, 6, (5, 4), (3, 3), stride=(2, 3), padding=((1, 0), (0, 2)),
                   dilation=(2, 1), groups=2, dtype="float64", transposed=True,
                   output_padding=(1, 0))]


@pytest.fixture(scope="module")
def served():
    adapter = load_adapter(f"exec:{PY} -m convwitness.serve reference")
    yield adapter
    adapter.target.close()


def _case(spec, seed=0):
    rng = np.random.default_rng(seed)
    mk = lambda s: rng.standard_normal(s).astype(spec.dtype)   # noqa: E731
    return mk(spec.x_shape), mk(spec.w_shape), (mk(spec.b_shape) if spec.bias else None), \
        mk(spec.y_shape)


def test_serve_reference_agrees_bit_for_bit(served):
    local = wrap(ReferenceAdapter())
    assert served.name == "reference" and served.capabilities == local.capabilities
    for spec in SPECS + TSPECS:
        x, w, b, g = _case(spec)
        np.testing.assert_array_equal(served.run(spec, x, w, b), local.run(spec, x, w, b))
        if not spec.transposed:
            for p, q in zip(served.backward(spec, x, w, b, g), local.backward(spec, x, w, b, g)):
                if q is None:
                    assert p is None
                else:
                    assert p.dtype == q.dtype and p.tobytes() == q.tobytes()


CHATTY = '''
import numpy as np
from convwitness.adapters.reference import ReferenceAdapter

class Chatty(ReferenceAdapter):
    name = "chatty"
    def forward(self, x, w, b, **kw):
        print("debug: forward called")          # on stdout: must not reach the channel
        import os; os.write(1, b"raw fd 1 write\\n")
        if x.shape[0] == 3:
            raise ValueError("three samples are refused")
        if x.shape[0] == 4:
            return [1, 2, 3]
        return super().forward(x, w, b, **kw)
'''


def test_serve_keeps_the_channel_clean_and_reports_failures(tmp_path):
    (tmp_path / "chatty.py").write_text(CHATTY)
    a = load_adapter(f"exec:{PY} -m convwitness.serve {tmp_path / 'chatty.py'}:Chatty")
    try:
        spec = SPECS[0]
        x, w, b, _ = _case(spec)
        y = a.forward(spec, x, w, b)
        np.testing.assert_array_equal(y, wrap(ReferenceAdapter()).forward(spec, x, w, b))
        out = a.target.drain_output()
        assert "debug: forward called" in out and "raw fd 1 write" in out
        s3 = spec.replace(batch=3)
        with pytest.raises(AdapterRaised, match="three samples are refused") as info:
            a.forward(s3, *_case(s3)[:3])
        assert "ValueError" in info.value.traceback_text
        s4 = spec.replace(batch=4)
        with pytest.raises(AdapterOutputError, match=r"y expected a numpy.ndarray, got list"):
            a.forward(s4, *_case(s4)[:3])
        np.testing.assert_array_equal(a.forward(spec, x, w, b), y)
        assert a.target.starts == 1          # error replies keep the program
    finally:
        a.target.close()


# -- deliberately broken programs -----------------------------------------------------
BROKEN = r'''
import json, os, struct, sys, time
mode, marker = sys.argv[1], sys.argv[2]
first = not os.path.exists(marker)      # misbehave in the first life only
open(marker, "a").close()

def readn(n):
    data = b""
    while len(data) < n:
        chunk = os.read(0, n - len(data))
        if not chunk:
            sys.exit(0)
        data += chunk
    return data

def send(header, payload=b""):
    raw = json.dumps(header).encode()
    os.write(1, b"CW/1" + struct.pack("<I", len(raw)) + raw + payload)

if mode == "early_exit":
    sys.stderr.write("cannot initialise the device\n"); sys.exit(7)
if mode == "garbage_hello":
    os.write(1, b"starting up...\n")
send({"type": "hello", "protocol": "cwire/1", "name": "broken-" + mode, "version": "0",
      "capabilities": {"passes": ["forward"]}, "arrays": []})
calls = 0
while True:
    pre = readn(8)
    h = json.loads(readn(struct.unpack("<I", pre[4:])[0]))
    data = {d["name"]: (d, readn(d["nbytes"])) for d in h["arrays"]}
    calls += 1
    d, xb = data["x"]
    good = {"type": "result", "id": h["id"], "arrays": [dict(d, name="y")]}
    sys.stderr.write(f"call {calls} in mode {mode}\n"); sys.stderr.flush()
    if first and calls == 1:
        if mode == "garbage":
            os.write(1, b"Hello from a debug print\n")
        elif mode == "exit_mid":
            raw = json.dumps(good).encode()
            os.write(1, b"CW/1" + struct.pack("<I", len(raw)) + raw[:10]); os._exit(3)
        elif mode == "segv":
            import signal; os.kill(os.getpid(), signal.SIGSEGV)
        elif mode == "bad_json":
            os.write(1, b"CW/1" + struct.pack("<I", 9) + b"{not json"); continue
        elif mode == "bad_dtype":
            send(dict(good, arrays=[dict(d, name="y", dtype="float65")]), xb); continue
        elif mode == "wrong_size":
            send(dict(good, arrays=[dict(d, name="y", nbytes=d["nbytes"] - 8)]), xb[:-8]); continue
        elif mode == "wrong_name":
            send(dict(good, arrays=[dict(d, name="z")]), xb); continue
        elif mode == "wrong_id":
            send(dict(good, id=h["id"] + 5), xb); continue
        elif mode == "hang":
            time.sleep(60)
        elif mode == "hog":
            hoard = bytearray(1 << 30)
    if mode == "error" and calls == 1:
        send({"type": "error", "id": h["id"], "message": "no kernel for this geometry", "arrays": []})
        continue
    send(good, xb)
'''

CASES = [
    ("garbage", AdapterOutputError,
     r"expected magic b'CW/1' at byte 0 of message 2 \(stream byte \d+\), got b'Hell'", 2),
    ("exit_mid", AdapterCrashed,
     r"exited with status 3 .*in the middle of message 2: it ended at byte 18 of the message "
     r"\(stream byte \d+\), 98 byte\(s\) short of the 108-byte header", 2),
    ("segv", AdapterCrashed, r"killed by SIGSEGV \(11\).*closed its stdout before message 2", 2),
    ("bad_json", AdapterOutputError, r"message 2: header is not JSON", 2),
    ("bad_dtype", AdapterOutputError, r"arrays\[0\]\.dtype 'float65' \(y\)", 2),
    ("wrong_size", AdapterOutputError, r"arrays\[0\]\.nbytes \(y\) is 16, but shape \[1, 1, 3\] "
                                       r"of float64 needs 24 bytes", 2),
    ("wrong_name", AdapterOutputError, r"arrays\[0\]\.name is 'z'", 2),
    ("wrong_id", AdapterOutputError, r"header field id is 6, expected 1", 2),
    ("hang", AdapterTimeout, r"within 0\.5 s.*still waiting for message 2", 2),
    ("error", AdapterRaised, r"the program replied with an error: no kernel for this geometry", 1),
]


@pytest.mark.parametrize("mode,exc,pattern,starts", CASES, ids=[c[0] for c in CASES])
def test_protocol_faults_name_the_place_and_the_next_call_works(tmp_path, mode, exc, pattern,
                                                                 starts):
    script = tmp_path / "broken.py"
    script.write_text(BROKEN)
    a = ExecAdapter(f"{PY} {script} {mode} {tmp_path / 'marker'}", call_timeout=0.5)
    x = np.array([[[1.0, 2.0, 3.0]]])
    w = np.ones((1, 1, 1))
    t0 = time.monotonic()
    try:
        with pytest.raises(exc, match=pattern) as info:
            a.forward(x, w, None, **KW1)
        assert time.monotonic() - t0 < 60     # bounded (no hang); generous for a loaded machine
        if exc is not AdapterOutputError:
            assert "call 1 in mode " + mode in info.value.output     # stderr is kept
        np.testing.assert_array_equal(a.forward(x, w, None, **KW1), x)
        assert a.starts == starts
    finally:
        a.close()


@pytest.mark.parametrize("mode,pattern", [
    ("early_exit", r"exited with status 7 during the hello.*cannot initialise the device"),
    ("garbage_hello", r"expected magic b'CW/1' at byte 0 of message 1 .*got b'star'"),
])
def test_faults_before_the_first_call_fail_the_load(tmp_path, mode, pattern):
    script = tmp_path / "broken.py"
    script.write_text(BROKEN)
    with pytest.raises(AdapterLoadError, match=pattern):
        ExecAdapter(f"{PY} {script} {mode} {tmp_path / 'marker'}")


def test_bad_commands_fail_the_load_in_one_line(tmp_path):
    with pytest.raises(AdapterLoadError, match=r"cannot start '/nonexistent/port'"):
        load_adapter("exec:/nonexistent/port --flag")
    with pytest.raises(AdapterLoadError, match=r"exec: needs a command"):
        load_adapter("exec:  ")
    with pytest.raises(AdapterLoadError, match=r"call_timeout=0 must be a positive number"):
        ExecAdapter(f"{PY} -c pass", call_timeout=0)


def test_memory_limit_stops_a_hungry_program(tmp_path):
    from convwitness.boundary.limits import parse_bytes
    assert parse_bytes("4GiB") == 4 << 30 and parse_bytes("512M") == 512 << 20
    assert parse_bytes(1024) == 1024 and parse_bytes(None) is None
    script = tmp_path / "broken.py"
    script.write_text(BROKEN)
    a = ExecAdapter(f"{PY} {script} hog {tmp_path / 'marker'}", memory_limit="256MiB")
    x = np.array([[[1.0, 2.0, 3.0]]])
    try:
        with pytest.raises(AdapterCrashed, match=r"exited with status 1") as info:
            a.forward(x, np.ones((1, 1, 1)), None, **KW1)
        assert "MemoryError" in info.value.output
        np.testing.assert_array_equal(a.forward(x, np.ones((1, 1, 1)), None, **KW1), x)
    finally:
        a.close()


def test_a_served_adapter_is_certified_through_exec(tmp_path):
    # the same path a foreign port takes: CLI -> exec: -> serve -> the reference
    import io
    from convwitness.cli.main import parse_args, run
    out, err = io.StringIO(), io.StringIO()
    code = run(parse_args(["run", "--adapter", f"exec:{PY} -m convwitness.serve reference",
                           "--only", "forward.reference,grad_input.reference,transposed.reference",
                           "--report", str(tmp_path / "r"), "--quiet"]), out, err)
    assert code == 0, out.getvalue() + err.getvalue()
    doc = json.loads((tmp_path / "r" / "report.json").read_text())
    assert [r["verdict"] for r in doc["invariants"]] == ["pass"] * 3
