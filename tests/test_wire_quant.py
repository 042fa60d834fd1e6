"""The quantized pass over cwire/1 (``exec:`` adapters and ``convwitness.serve``).

Outside judges, named beside each check:
- an independent program written here with :mod:`struct`, :mod:`json` and numpy only
  (no convwitness import), from the field list of docs/wire-protocol.md: it decodes the
  quantized call and computes the integer accumulation sum (x - x_zp)(w - w_zp[o]) with
  padding at the input zero point (the ONNX ConvInteger operator's definition, from
  memory), and convwitness must accept its replies and agree with them;
- JSON numbers written by Python's json module are the shortest round-trip
  representation of an IEEE 754 binary64 (Python's float repr, documented in the
  Python tutorial's "Floating Point Arithmetic"), so scales travel exactly;
- the in-process certification of the same adapter: the exec path must reach the same
  verdicts on the same seed (a consistency check across the process boundary).
"""
from __future__ import annotations

import json
import os
import sys

import numpy as np
import pytest

from convwitness.boundary.loading import load_adapter
from convwitness.geometry.quant import QuantSpec
from convwitness.geometry.spec import ConvSpec
from convwitness.numerics import requant as rq
from convwitness.run.certify import certify
from convwitness.run.witness import replay

PY = sys.executable
SERVE = f"exec:{PY} -m convwitness.serve"


def _verdicts(adapter, seed=0, report_dir=None):
    _, res = certify(adapter, profile="quick", seed=seed, report_dir=report_dir, only="quantized.*")
    return {r.id: (r.verdict, r.examples) for r in res}


def test_quantized_control_over_exec_gives_the_in_process_verdicts():
    local = load_adapter("quant-numpy")
    served = load_adapter(f"{SERVE} quant-numpy")
    try:
        assert served.capabilities == local.capabilities
        assert served.capabilities.quant is not None and served.capabilities.unclaimed_passes == frozenset()
        got, want = _verdicts(served), _verdicts(local)
    finally:
        served.target.close()
    assert got == want
    assert {v for v, _ in got.values()} == {"pass"} and len(got) >= 8


def test_planted_quantized_bug_over_exec_is_caught_and_its_witness_replays(tmp_path):
    spec = f"{SERVE} convwitness.adapters.zoo_quant:RawZeroPadding"
    served = load_adapter(spec)
    try:
        got = _verdicts(served, report_dir=str(tmp_path / "r"))
    finally:
        served.target.close()
    assert got["quantized.padding_zero"][0] == "fail", got
    witness = str(tmp_path / "r" / "witnesses" / "quantized.padding_zero.json")
    meta = json.loads(open(witness).read())
    assert meta["quant"]["x_zero_point"] != 0    # a raw 0 shows only where the zero point is not 0
    again = load_adapter(spec)
    try:
        verdict, _, message, _ = replay(witness, again)
    finally:
        again.target.close()
    assert verdict == "fail", message
    # the same file judged in process: the bug fails, the correct control passes
    assert replay(witness, load_adapter("convwitness.adapters.zoo_quant:RawZeroPadding"))[0] == "fail"
    assert replay(witness, load_adapter("quant-numpy"))[0] == "pass"


FOREIGN = r'''
import json, struct, sys
import numpy as np
log, inp, sink = sys.argv[1], sys.stdin.buffer, sys.stdout.buffer

def take(n):                      # a buffered read returns short only at end of input
    data = inp.read(n)
    if len(data) < n:
        sys.exit(0)
    return data

def send(header, payload=b""):
    raw = json.dumps(header).encode()
    sink.write(b"CW/1" + struct.pack("<I", len(raw)) + raw + payload)
    sink.flush()

send({"type": "hello", "protocol": "cwire/1", "name": "foreign-int", "version": "1",
      "capabilities": {"passes": ["quantized"], "ndims": [1],
                       "quant": {"outputs": ["int32"], "bias": ["none", "int32"]}}, "arrays": []})
while True:
    h = json.loads(take(struct.unpack("<4sI", take(8))[1]))
    a = {d["name"]: np.frombuffer(take(d["nbytes"]), d["dtype"]).reshape(d["shape"]) for d in h["arrays"]}
    with open(log, "a") as f:
        f.write(json.dumps(h) + "\n")
    p, q = h["params"], h["params"]["quant"]
    x = a["x"].astype(np.int64) - q["x_zero_point"]           # padding at the zero point: 0 here
    (lo, hi), = p["padding"]
    x = np.pad(x, [(0, 0), (0, 0), (lo, hi)])
    w, (s,), (d,), g = a["w"].astype(np.int64), p["stride"], p["dilation"], p["groups"]
    zp = np.broadcast_to(np.array(q["w_zero_point"]), (w.shape[0],))
    w = w - zp[:, None, None]
    n, cin, L = x.shape
    cout, cpg, k = w.shape
    out = (L - d * (k - 1) - 1) // s + 1
    y = np.zeros((n, cout, out), np.int64)
    for o in range(cout):
        grp = o // (cout // g)
        for t in range(out):
            win = x[:, grp * cpg:(grp + 1) * cpg, t * s:t * s + d * (k - 1) + 1:d]
            y[:, o, t] = (win * w[o]).sum(axis=(1, 2))
    if "b" in a:
        y += a["b"].astype(np.int64)[None, :, None]
    y = y.astype("<i4")
    send({"type": "result", "id": h["id"],
          "arrays": [{"name": "y", "dtype": "int32", "shape": list(y.shape), "nbytes": y.nbytes}]},
         y.tobytes())
'''


def test_a_foreign_program_reads_the_documented_quantized_call(tmp_path):
    prog, log = tmp_path / "foreign.py", tmp_path / "calls.jsonl"
    prog.write_text(FOREIGN)
    a = load_adapter(f"exec:{PY} {prog} {log}")
    conv = ConvSpec(batch=2, in_channels=4, out_channels=6, input_size=(7,), kernel_size=(3,),
                    stride=(2,), padding=((2, 1),), dilation=(2,), groups=2, bias=True, dtype="float64")
    w_scale = (0.1, 1 / 3, 2.0 ** -20, 7.5, 0.30000000000000004, 1e-3)
    spec = QuantSpec(conv, x_dtype="uint8", x_scale=0.007874015748031496, x_zero_point=131,
                     w_scale=w_scale, w_zero_point=(3, -128, 0, 127, -1, 5), bias="int32")
    rng = np.random.default_rng(5)
    x = rng.integers(0, 256, spec.x_shape).astype(np.uint8)
    w = rng.integers(-128, 128, spec.w_shape).astype(np.int8)
    b = rng.integers(-10 ** 6, 10 ** 6, (6,)).astype(np.int32)
    try:
        assert a.capabilities.passes == frozenset({"quantized"}) and a.capabilities.quant.outputs == {"int32"}
        y = a.quantized(spec, x, w, b)
    finally:
        a.target.close()
    # the foreign program's sum, taken through the documented fields, is the exact one
    np.testing.assert_array_equal(y.astype(np.int64), rq.reference(spec, x, w, b)[0])
    h = json.loads(log.read_text().splitlines()[0])
    assert h["method"] == "quantized"
    q = h["params"]["quant"]
    assert q["x_scale"] == spec.x_scale and q["w_scale"] == list(w_scale)      # exact: binary64 round trip
    assert q["w_zero_point"] == [3, -128, 0, 127, -1, 5] and q["x_zero_point"] == 131
    assert (q["y_scale"], q["clamp"], q["output"], q["bias"]) == (None, None, "int32", "int32")
    assert [(d["name"], d["dtype"]) for d in h["arrays"]] == [("x", "uint8"), ("w", "int8"), ("b", "int32")]


def test_a_quantized_call_without_its_parameters_is_refused_in_one_line(tmp_path):
    # convwitness.serve answers a call whose params lack "quant" with an error reply that
    # names the missing fields; the program stays usable (docs/wire-protocol.md, faults)
    from convwitness.boundary.wire.codec import Reader, encode, read_message, write_all
    import subprocess
    proc = subprocess.Popen([PY, "-m", "convwitness.serve", "quant-numpy"], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, bufsize=0)
    try:
        reader = Reader(proc.stdout.fileno(), "serve")
        hello = read_message(reader)[0]
        assert hello["capabilities"]["passes"] == ["quantized"]
        params = {"stride": [1], "padding": [[0, 0]], "dilation": [1], "groups": 1,
                  "layout": "channels_first", "output_padding": [0]}
        x, w = np.zeros((1, 1, 3), np.uint8), np.zeros((1, 1, 2), np.int8)
        write_all(proc.stdin.fileno(), encode({"type": "call", "id": 1, "method": "quantized",
                                               "params": params}, [("x", x), ("w", w)])[0])
        reply = read_message(reader)[0]
    finally:
        proc.stdin.close()
        proc.wait(30)
        proc.stdout.close()
    assert reply["type"] == "error" and reply["id"] == 1
    assert "params.quant lacks x_scale" in reply["message"] and "\n" not in reply["message"]


@pytest.mark.parametrize("name", ["quant-numpy-fixed"])
def test_served_model_controls_keep_their_model(name):
    # the requantization model is part of the claim and travels in the hello
    served = load_adapter(f"{SERVE} {name}")
    try:
        assert served.capabilities.quant.model == load_adapter(name).capabilities.quant.model == "fixed_point"
    finally:
        served.target.close()


def test_a_transposed_channels_last_quantized_call_travels():
    # the transposed direction and the channels-last layout over the wire: the served
    # control answers what the exact reference says, and the client sizes the reply
    # region for exactly the y that comes back
    from convwitness.boundary.contract import quant_kwargs
    from convwitness.boundary.wire.messages import output_bytes, params, quant_params
    conv = ConvSpec(batch=2, in_channels=4, out_channels=6, input_size=(3, 4), kernel_size=(2, 3),
                    stride=(2, 1), padding=((1, 1), (0, 2)), output_padding=(1, 0), groups=2,
                    transposed=True, bias=True, dtype="float64", layout="channels_last")
    spec = QuantSpec(conv, x_dtype="int8", x_zero_point=-7, w_scale=tuple(0.01 * (i + 1) for i in range(6)),
                     w_zero_point=(1, 2, 3, 4, 5, 6), bias="float", output="int8", y_scale=0.3,
                     y_zero_point=4, clamp=(-50, 100))
    rng = np.random.default_rng(1)
    x = rng.integers(-128, 128, spec.x_shape).astype(np.int8)
    w = rng.integers(-128, 128, spec.w_shape).astype(np.int8)
    b = rng.standard_normal(6).astype(np.float32)
    served = load_adapter(f"{SERVE} quant-numpy")
    try:
        y = served.quantized(spec, x, w, b)
    finally:
        served.target.close()
    assert y.shape == spec.y_shape == (2, 5, 4, 6)
    assert np.array_equal(y.astype(np.int64), rq.reference(spec, x, w, b)[0])
    kw = quant_kwargs(spec)
    assert kw["transposed"] is True and kw["output_padding"] == (1, 0)
    geometry = params(kw["stride"], kw["padding"], kw["dilation"], kw["groups"], kw["layout"], kw["output_padding"])
    p = quant_params(geometry, kw, b, transposed=True)
    assert p["quant"]["transposed"] is True and p["output_padding"] == [1, 0]
    assert output_bytes("quantized", {"x": x, "w": w}, p) == y.nbytes + 64
