"""The C port (tests/c_port/convport.c) over exec:, and a planted-bug copy of it.

The port is compiled with the system C compiler into a temporary folder (skipped,
with the reason, where none exists). Outside source: torch.nn.functional's
convolutions and autograd, on small-integer data, where every summation order is
exact, so the port must agree bit for bit (common practice, no source: integer
products and sums below 2**24 are exact in binary32, IEEE 754-2019 §3.3 precision
p = 24). Then the full quick suite certifies it through exec:, and the copy built
with -DCONVPORT_TAILBUG (bug class C01, strided tail of the input gradient) is
caught with a witness that replays.
"""
from __future__ import annotations

import io
import json
import os
import shutil
import subprocess

import numpy as np
import pytest

from convwitness import ConvSpec
from convwitness.cli.main import parse_args, run
from convwitness.boundary.loading import load_adapter

HERE = os.path.dirname(os.path.abspath(__file__))
SOURCE = os.path.join(HERE, "c_port", "convport.c")


def _compiler():
    for name in (os.environ.get("CC"), "cc", "gcc", "clang"):
        if name and shutil.which(name):
            return shutil.which(name)
    return None


@pytest.fixture(scope="module")
def ports(tmp_path_factory):
    cc = _compiler()
    if cc is None:
        pytest.skip("no C compiler (cc, gcc or clang) on PATH; the C port cannot be built")
    out = tmp_path_factory.mktemp("c_port")
    built = {}
    for name, flags in (("convport", []), ("convport_tailbug", ["-DCONVPORT_TAILBUG"]),
                        ("convport_faults", ["-DCONVPORT_FAULTS"])):
        exe = str(out / name)
        proc = subprocess.run([cc, "-O2", "-std=c99", *flags, "-o", exe, SOURCE, "-lm"],
                              capture_output=True, text=True)
        assert proc.returncode == 0, f"{cc} failed on {SOURCE}:\n{proc.stderr}"
        built[name] = exe
    return built


def _cli(argv):
    out, err = io.StringIO(), io.StringIO()
    code = run(parse_args(argv), out, err)
    return code, out.getvalue(), err.getvalue()


# geometries torch can express (asymmetric and negative padding through F.pad)
GEOMETRIES = [
    ConvSpec(2, 4, 6, (9,), (3,), stride=2, padding=((1, 2),), dilation=2, groups=2),
    ConvSpec(1, 3, 3, (7, 6), (3, 3), stride=(2, 1), padding=1, groups=3),
    ConvSpec(2, 2, 4, (5, 6, 4), (2, 3, 2), stride=(1, 2, 2), padding=((0, 1), (1, 0), (0, 0)),
             dilation=(2, 1, 1)),
    ConvSpec(1, 2, 3, (8, 7), (2, 2), stride=(3, 2), padding=((-1, 1), (0, -2)), bias=False),
    ConvSpec(2, 4, 2, (10, 9), (3, 2), stride=(3, 2), padding=((2, 0), (1, 1)), groups=2),
    # large enough for the shared region, and to make the client grow it past 1 MiB
    ConvSpec(8, 8, 8, (40, 40), (3, 3), stride=1, padding=1),
]
TRANSPOSED = [
    ConvSpec(2, 4, 6, (5, 4), (3, 3), stride=(2, 3), padding=((1, 0), (0, 2)), dilation=(2, 1),
             groups=2, transposed=True, output_padding=(1, 0)),
    ConvSpec(1, 3, 2, (6,), (1,), stride=2, transposed=True, output_padding=(1,)),
]


def _ints(rng, shape, dtype):
    return rng.integers(-3, 4, size=shape).astype(dtype)


def _torch_conv(torch, spec, x, w, b, g):
    F = torch.nn.functional
    nd = spec.ndim
    conv = (F.conv1d, F.conv2d, F.conv3d)[nd - 1]
    xt = torch.tensor(x, requires_grad=True)
    wt = torch.tensor(w, requires_grad=True)
    bt = torch.tensor(b, requires_grad=True) if b is not None else None
    pads = [p for lo_hi in reversed(spec.padding) for p in lo_hi]     # F.pad: last axis first
    y = conv(F.pad(xt, pads), wt, bt, stride=spec.stride, dilation=spec.dilation,
             groups=spec.groups)
    (y * torch.tensor(g)).sum().backward()
    grads = [xt.grad.numpy(), wt.grad.numpy(), None if bt is None else bt.grad.numpy()]
    return y.detach().numpy(), grads


def _torch_transposed(torch, spec, x, w, b):
    F = torch.nn.functional
    convt = (F.conv_transpose1d, F.conv_transpose2d, F.conv_transpose3d)[spec.ndim - 1]
    y = convt(torch.tensor(x), torch.tensor(w), None if b is None else torch.tensor(b),
              stride=spec.stride, dilation=spec.dilation, groups=spec.groups,
              output_padding=spec.output_padding)
    crop = tuple(slice(lo, y.shape[2 + i] - hi) for i, (lo, hi) in enumerate(spec.padding))
    return y.numpy()[(slice(None), slice(None)) + crop]


@pytest.mark.parametrize("dtype,shared_memory", [("float32", True), ("float64", True),
                                                  ("float64", False)])
def test_c_port_equals_torch_on_integer_data(ports, dtype, shared_memory):
    torch = pytest.importorskip("torch")
    port = load_adapter(f"exec:{ports['convport']}", shared_memory=shared_memory)
    assert (port.target._state.region is not None) == shared_memory
    rng = np.random.default_rng(3)
    try:
        for spec in GEOMETRIES:
            spec = spec.replace(dtype=dtype)
            x, w = _ints(rng, spec.x_shape, dtype), _ints(rng, spec.w_shape, dtype)
            b = _ints(rng, spec.b_shape, dtype) if spec.bias else None
            g = _ints(rng, spec.y_shape, dtype)
            y_t, grads_t = _torch_conv(torch, spec, x, w, b, g)
            np.testing.assert_array_equal(port.forward(spec, x, w, b), y_t, err_msg=spec.describe())
            for got, want, what in zip(port.backward(spec, x, w, b, g), grads_t,
                                       ("grad_x", "grad_w", "grad_b")):
                if want is None:
                    assert got is None
                else:
                    np.testing.assert_array_equal(got, want, err_msg=f"{what} {spec.describe()}")
        for spec in TRANSPOSED:
            spec = spec.replace(dtype=dtype)
            x, w = _ints(rng, spec.x_shape, dtype), _ints(rng, spec.w_shape, dtype)
            b = _ints(rng, spec.b_shape, dtype)
            np.testing.assert_array_equal(port.transposed(spec, x, w, b),
                                          _torch_transposed(torch, spec, x, w, b),
                                          err_msg=spec.describe())
    finally:
        port.target.close()


def test_c_port_declares_itself_in_the_hello(ports):
    port = load_adapter(f"exec:{ports['convport']}")
    try:
        caps = port.capabilities
        assert (port.name, port.version) == ("convport", "1.0")
        assert caps.passes == {"forward", "backward", "transposed"}
        assert caps.dtypes == {"float32", "float64"} and caps.layouts == {"channels_first"}
        model = caps.error_model
        assert (model.algorithm, model.accumulate, model.product) == ("direct", None, None)
        # a request outside its claims gets an error reply, and the program stays
        spec = ConvSpec(1, 2, 2, (5,), (3,), dtype="float16")
        from convwitness.errors import AdapterRaised
        with pytest.raises(AdapterRaised, match="convport computes float32 and float64 only"):
            port.forward(spec, np.ones(spec.x_shape, np.float16), np.ones(spec.w_shape, np.float16),
                         np.ones(2, np.float16))
        assert port.target.starts == 1
    finally:
        port.target.close()


def test_c_port_is_certified_by_the_full_quick_suite(ports, tmp_path):
    report = tmp_path / "report"
    code, out, err = _cli(["run", "--adapter", f"exec:{ports['convport']}", "--profile", "quick",
                           "--report", str(report), "--quiet"])
    assert code == 0, out + err
    doc = json.loads((report / "report.json").read_text())
    verdicts = {r["id"]: r["verdict"] for r in doc["invariants"]}
    assert doc["status"] == "complete"
    # only the layout invariant does not apply (the port claims channels_first alone), and
    # the quantized surface (the port has no integer convolution)
    assert {k for k, v in verdicts.items() if v != "pass" and not k.startswith("quantized.")} \
        == {"forward.layout_agreement"}
    assert all(v == "not-applicable" for k, v in verdicts.items() if k.startswith("quantized."))
    assert verdicts["forward.layout_agreement"] == "not-applicable"


def test_planted_strided_tail_bug_is_caught_and_replays(ports, tmp_path):
    report = tmp_path / "report"
    bug, good = f"exec:{ports['convport_tailbug']}", f"exec:{ports['convport']}"
    code, out, err = _cli(["run", "--adapter", bug, "--profile", "quick",
                           "--only", "backward.*,grad_input.*,grad_weight.*,grad_bias.*,transposed.*", "--report", str(report), "--quiet"])
    assert code == 1, out + err
    doc = json.loads((report / "report.json").read_text())
    verdicts = {r["id"]: r["verdict"] for r in doc["invariants"]}
    assert verdicts["grad_input.reference"] == "fail"
    assert verdicts["grad_weight.reference"] == "pass"      # only the input gradient is planted
    witness = report / "witnesses" / "grad_input.reference.json"
    spec = ConvSpec.from_dict(json.loads(witness.read_text())["spec"])
    # C01's trigger: a stride >= 2 whose windows leave a remainder (BUG-CLASSES.md)
    assert any(s >= 2 and r != 0 for s, r in zip(spec.stride, spec.remainder)), spec.describe()
    assert _cli(["replay", str(witness), "--adapter", bug])[0] == 1
    code, out, _ = _cli(["replay", str(witness), "--adapter", good])
    assert code == 0, out


def test_a_crashing_and_chattering_port_gets_verdicts_and_the_run_goes_on(ports, tmp_path):
    # -DCONVPORT_FAULTS: forward with groups > 1 dies of SIGSEGV; backward with a batch
    # >= 2 prints a debug line on stdout. Each is a verdict of its own invariant; the
    # restarted program serves the next one, and the report validates.
    from convwitness.report.document import validate_report
    report = tmp_path / "report"
    code, out, err = _cli(["run", "--adapter", f"exec:{ports['convport_faults']}", "--only",
                           "forward.group_split,grad_bias.reference,transposed.reference",
                           "--report", str(report), "--quiet"])
    assert code == 1, out + err
    doc = json.loads((report / "report.json").read_text())
    validate_report(doc)
    res = {r["id"]: r for r in doc["invariants"]}
    assert doc["status"] == "complete"
    assert res["forward.group_split"]["verdict"] == "crash"
    assert "killed by SIGSEGV (11)" in res["forward.group_split"]["message"]
    assert res["grad_bias.reference"]["verdict"] == "fail"
    assert "expected magic b'CW/1' at byte 0 of message" in res["grad_bias.reference"]["message"]
    assert "got b'debu'" in res["grad_bias.reference"]["message"]
    assert res["transposed.reference"]["verdict"] == "pass"
    assert (report / "witnesses" / "forward.group_split.json").exists()
