"""The built-in adapters against the float64 reference, and their declared behaviour.

Each adapter, loaded by name, must agree with convwitness.numerics.reference on a handful of
geometries in every dtype, layout and pass it claims, within the bound derived from
its own declared error model (convwitness.numerics.bounds.derive; Higham 2002, §3.1,
gamma_n). The libraries behind them (torch, jax, onnxruntime, scipy) are the outside
sources; the reference itself is checked against them in
test_reference_vs_libraries.py.
"""
from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import textwrap

import numpy as np
import pytest

import convwitness
from convwitness import AdapterUnavailable, ConvSpec
from convwitness.numerics import reference as ref
from convwitness.numerics.bounds import derive
from convwitness.geometry.formats import numpy_dtype

ADAPTERS = ["reference", "torch", "jax", "onnxruntime", "scipy"]

# A handful of geometries (channels first, float32; dtype and layout are swapped in).
CONV = [
    # 1-D, asymmetric padding, dilation, groups, stride remainder (9+1+2-5) mod 2 = 1
    ConvSpec(2, 4, 6, (9,), (3,), stride=2, padding=((1, 2),), dilation=2, groups=2),
    # 2-D depthwise, symmetric padding
    ConvSpec(1, 3, 3, (7, 6), (3, 3), stride=(2, 1), padding=1, groups=3),
    # 3-D, asymmetric padding, dilation on one axis
    ConvSpec(2, 2, 4, (5, 6, 4), (2, 3, 2), stride=(1, 2, 2), padding=((0, 1), (1, 0), (0, 0)),
             dilation=(2, 1, 1)),
    # negative padding (crops the input)
    ConvSpec(1, 2, 3, (8, 7), (2, 2), stride=(3, 2), padding=((-1, 1), (0, -2))),
    # zero-size batch
    ConvSpec(0, 2, 2, (5, 5), (3, 3), padding=1),
    # 1x1 kernel, no bias
    ConvSpec(3, 4, 2, (6,), (1,), bias=False),
]
TRANSPOSED = [
    ConvSpec(2, 4, 6, (5, 4), (3, 2), stride=(2, 3), padding=((1, 2), (0, 1)), dilation=(2, 1),
             groups=2, transposed=True, output_padding=(1, 2)),
    ConvSpec(1, 3, 2, (4,), (3,), stride=2, padding=1, transposed=True, output_padding=1, bias=False),
    ConvSpec(1, 2, 2, (3, 2, 2), (2, 2, 2), stride=2, groups=2, transposed=True),
    ConvSpec(0, 2, 2, (3,), (2,), stride=2, transposed=True),
    # asymmetric padding, no output padding
    ConvSpec(1, 2, 4, (4, 3), (2, 3), stride=(2, 1), padding=((0, 2), (1, 0)), groups=2,
             transposed=True),
    # output_padding >= stride, allowed because the dilation is larger
    ConvSpec(1, 2, 3, (4,), (2,), dilation=2, output_padding=1, transposed=True),
]


_LOADED: dict = {}


def load(name):
    """convwitness.load_adapter(name), once per name; skip when the library is missing."""
    if name not in _LOADED:
        try:
            _LOADED[name] = convwitness.load_adapter(name)
        except AdapterUnavailable as exc:
            _LOADED[name] = exc
    got = _LOADED[name]
    if isinstance(got, Exception):
        pytest.skip(str(got))
    return got


def variants(adapter, spec):
    """spec in every claimed dtype and layout the adapter admits."""
    caps = adapter.capabilities
    every = (spec.replace(dtype=d, layout=lay) for d in sorted(caps.dtypes) for lay in sorted(caps.layouts))
    return [s for s in every if caps.admits(s)]


def draw(spec, seed=0):
    rng = np.random.default_rng(seed)
    dt = numpy_dtype(spec.dtype)
    x = rng.standard_normal(spec.x_shape).astype(dt)
    w = rng.standard_normal(spec.w_shape).astype(dt)
    b = rng.standard_normal(spec.out_channels).astype(dt) if spec.bias else None
    gy = rng.standard_normal(spec.y_shape).astype(dt)
    return x, w, b, gy


def check(adapter, spec, pass_, got, expected, magnitude, with_bias=False):
    model = adapter.capabilities.error_model_for(spec.dtype, pass_)
    bound = derive(spec, model, pass_, magnitude, expected, with_bias=with_bias)
    err = np.abs(got.astype(np.float64) - expected)
    bad = ~(err <= bound.values)
    if bad.any():
        i = np.unravel_index(np.argmax(np.where(bad, np.inf, err - bound.values)), err.shape)
        pytest.fail(f"adapter {adapter.name} {pass_}: {int(bad.sum())}/{err.size} elements beyond "
                    f"the bound ({bound.explain()}); worst at {i}: reference={expected[i]!r} "
                    f"got={got[i]!r} bound={bound.values[i]:.3g}; spec={spec!r}")


# -- agreement with the reference ---------------------------------------------------------
@pytest.mark.parametrize("name", ADAPTERS)
@pytest.mark.parametrize("geometry", range(len(CONV)))
def test_forward_and_backward_agree_with_reference(name, geometry):
    adapter = load(name)
    specs = variants(adapter, CONV[geometry])
    if not specs:
        pytest.skip(f"{name} claims none of {CONV[geometry].describe()} in any dtype/layout")
    for spec in specs:
        x, w, b, gy = draw(spec, seed=geometry)
        check(adapter, spec, "forward", adapter.forward(spec, x, w, b), ref.forward(spec, x, w, b),
              ref.forward_magnitude(spec, x, w, b), with_bias=spec.bias)
        if "backward" not in adapter.capabilities.passes:
            continue
        gx, gw, gb = adapter.backward(spec, x, w, b, gy)
        check(adapter, spec, "grad_input", gx, ref.grad_input(spec, w, gy),
              ref.grad_input_magnitude(spec, w, gy))
        check(adapter, spec, "grad_weight", gw, ref.grad_weight(spec, x, gy),
              ref.grad_weight_magnitude(spec, x, gy))
        if spec.bias:
            check(adapter, spec, "grad_bias", gb, ref.grad_bias(spec, gy),
                  ref.grad_bias_magnitude(spec, gy))
        else:
            assert gb is None, f"{name} backward: grad_b must be None without a bias, got {gb!r}"


@pytest.mark.parametrize("name", ADAPTERS)
@pytest.mark.parametrize("geometry", range(len(TRANSPOSED)))
def test_transposed_agrees_with_reference(name, geometry):
    adapter = load(name)
    if "transposed" not in adapter.capabilities.passes:
        pytest.skip(f"{name} does not claim the transposed pass")
    specs = variants(adapter, TRANSPOSED[geometry])
    if not specs:
        pytest.skip(f"{name} claims none of {TRANSPOSED[geometry].describe()}")
    for spec in specs:
        x, w, b, _ = draw(spec, seed=geometry)
        check(adapter, spec, "transposed", adapter.transposed(spec, x, w, b),
              ref.transposed(spec, x, w, b), ref.forward_magnitude(spec, x, w, b),
              with_bias=spec.bias)


@pytest.mark.parametrize("name", ADAPTERS)
def test_deterministic_claim(name):
    """deterministic=True: the same call twice gives bit-identical results."""
    adapter = load(name)
    if not adapter.capabilities.deterministic:
        pytest.skip(f"{name} does not claim determinism")
    spec = ConvSpec(8, 8, 16, (20, 20), (3, 3), padding=((1, 2), (2, 1)), stride=(1, 2))
    spec = variants(adapter, spec)[0]
    x, w, b, gy = draw(spec)
    assert np.array_equal(adapter.forward(spec, x, w, b), adapter.forward(spec, x, w, b))
    if "backward" in adapter.capabilities.passes:
        first, second = adapter.backward(spec, x, w, b, gy), adapter.backward(spec, x, w, b, gy)
        for a, c in zip(first, second):
            assert np.array_equal(a, c)


@pytest.mark.parametrize("name", ADAPTERS)
def test_identity(name):
    adapter = load(name)
    assert adapter.name == name
    if name != "reference":
        assert adapter.version == pytest.importorskip(name).__version__


# -- unclaimed space: the reasons hold ------------------------------------------------------
def test_onnxruntime_has_no_float64_conv():
    """float64 is not claimed: onnxruntime's CPU provider has no float64 Conv kernel
    (source: onnxruntime raises NOT_IMPLEMENTED when the session is built)."""
    adapter = load("onnxruntime")
    assert "float64" not in adapter.capabilities.dtypes
    spec = CONV[0].replace(dtype="float64")
    x, w, b, _ = draw(spec)
    with pytest.raises(Exception, match="NOT_IMPLEMENTED"):
        adapter.target.forward(x, w, b, stride=spec.stride, padding=spec.padding,
                               dilation=spec.dilation, groups=spec.groups)


def test_onnxruntime_float16_runs_in_float32():
    """The float16 error model says "float32 accumulation": onnxruntime's optimised graph
    wraps the Conv in Casts (source: the session's optimized_model_filepath output)."""
    onnx = pytest.importorskip("onnx")
    ort = pytest.importorskip("onnxruntime")
    adapter = load("onnxruntime")
    assert adapter.capabilities.error_model_for("float16").accumulate == "float32"
    model = adapter.target._model("Conv", "float16", 1, {"pads": [0, 0]}, False)
    with tempfile.TemporaryDirectory() as tmp:
        options = ort.SessionOptions()
        options.optimized_model_filepath = os.path.join(tmp, "opt.onnx")
        options.log_severity_level = 3
        ort.InferenceSession(model.SerializeToString(), options, providers=["CPUExecutionProvider"])
        ops = [n.op_type for n in onnx.load(options.optimized_model_filepath).graph.node]
    assert "Cast" in ops and "Conv" in ops, ops


def test_jax_does_not_claim_negative_padding():
    """Finding jax.negative_padding_float32 (scripts/library_findings.py prints whether
    it holds here): JaxAdapter leaves negative padding unclaimed."""
    assert "negative" not in load("jax").capabilities.padding


def test_jax_does_not_claim_backward():
    """Finding jax.vjp_strided_abort (scripts/library_findings.py prints whether it holds
    here): JaxAdapter offers backward but does not claim it."""
    assert "backward" not in load("jax").capabilities.passes


# -- caching ------------------------------------------------------------------------------
def test_jax_compiles_once_per_geometry(monkeypatch):
    """Repeated value draws of one geometry never trace again. Observed from outside:
    jax.lax.conv_general_dilated is only called while jax traces a function."""
    jax = pytest.importorskip("jax")
    from convwitness.adapters.jax_lax import JaxAdapter
    calls = []
    real = jax.lax.conv_general_dilated

    def counting(*args, **kwargs):
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(jax.lax, "conv_general_dilated", counting)
    adapter = convwitness.wrap(JaxAdapter())
    spec, spec_t = CONV[0], TRANSPOSED[0]
    for seed in range(4):
        x, w, b, _ = draw(spec, seed)
        adapter.forward(spec, x, w, b)
        x, w, b, _ = draw(spec_t, seed)
        adapter.transposed(spec_t, x, w, b)
    # one trace of the forward function, one of the transposed one
    assert len(calls) == 2, calls
    assert adapter.target.trace_count == 2
    other = spec.replace(stride=(3,))
    x, w, b, _ = draw(other)
    adapter.forward(other, x, w, b)
    assert len(calls) == 3                 # a new geometry does trace


def test_onnxruntime_sessions_are_cached(monkeypatch):
    ort = pytest.importorskip("onnxruntime")
    adapter = load("onnxruntime")
    adapter.target._sessions.clear()
    made = []
    real = ort.InferenceSession

    def counting(*args, **kwargs):
        made.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(ort, "InferenceSession", counting)
    spec = CONV[0]
    for seed in range(3):
        x, w, b, _ = draw(spec, seed)
        adapter.forward(spec, x, w, b)
    bigger = spec.replace(batch=3, input_size=(12,))      # same geometry, other sizes
    x, w, b, _ = draw(bigger)
    check(adapter, bigger, "forward", adapter.forward(bigger, x, w, b), ref.forward(bigger, x, w, b),
          ref.forward_magnitude(bigger, x, w, b), with_bias=True)
    assert len(made) == 1
    other = spec.replace(stride=(3,))
    x, w, b, _ = draw(other)
    adapter.forward(other, x, w, b)
    assert len(made) == 2


# -- torch's float32 math mode ------------------------------------------------------------
def test_torch_declares_onednn_bf16_mode():
    """With oneDNN's float32 math mode set to bf16 the adapter declares bfloat16 operands,
    and the results stay inside that model's bound (torch.backends.mkldnn.conv)."""
    torch = pytest.importorskip("torch")
    from convwitness.adapters.torch_nn import TorchAdapter
    conv = getattr(torch.backends.mkldnn, "conv", None)
    if conv is None or not hasattr(conv, "fp32_precision"):
        pytest.skip("this torch has no torch.backends.mkldnn.conv.fp32_precision")
    before = conv.fp32_precision
    try:
        conv.fp32_precision = "bf16"
        adapter = convwitness.wrap(TorchAdapter())
        assert adapter.capabilities.error_model_for("float32").operand == "bfloat16"
        spec = ConvSpec(16, 8, 8, (9, 9), (3, 3), padding=1)   # batch 16: oneDNN's path
        x, w, b, _ = draw(spec)
        check(adapter, spec, "forward", adapter.forward(spec, x, w, b), ref.forward(spec, x, w, b),
              ref.forward_magnitude(spec, x, w, b), with_bias=True)
    finally:
        conv.fp32_precision = before
    assert TorchAdapter().capabilities.error_model_for("float32").operand is None


# -- missing libraries and import laziness -------------------------------------------------
HINTS = {
    "torch": ("torch", "pip install torch==2.13.0"),
    "jax": ("jax", "pip install 'convwitness[jax]'"),
    "onnxruntime": ("onnxruntime", "pip install 'convwitness[onnx]'"),
    "scipy": ("scipy", "pip install 'convwitness[scipy]'"),
}


def _python(code: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", textwrap.dedent(code)], capture_output=True,
                          text=True, timeout=120)


@pytest.mark.parametrize("name", sorted(HINTS))
def test_missing_library_is_unavailable_with_pip_hint(name):
    module, hint = HINTS[name]
    out = _python(f"""
        import sys
        sys.modules[{module!r}] = None          # makes `import {module}` raise ImportError
        import convwitness
        try:
            convwitness.load_adapter({name!r})
        except convwitness.AdapterUnavailable as exc:
            print("UNAVAILABLE:", exc)
        """)
    assert out.returncode == 0, out.stderr
    line = out.stdout.strip()
    assert line.startswith("UNAVAILABLE:"), (line, out.stderr)
    assert hint in line, line
    assert "\n" not in line


def test_adapter_modules_import_no_library():
    out = _python("""
        import sys
        import convwitness
        import convwitness.adapters.torch_nn, convwitness.adapters.jax_lax
        import convwitness.adapters.onnxruntime_node, convwitness.adapters.scipy_signal
        print(sorted(m for m in ("torch", "jax", "onnx", "onnxruntime", "scipy") if m in sys.modules))
        """)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_onnxruntime_output_padding_reason():
    """output_padding is claimed below the stride only: onnxruntime refuses
    output_padding >= stride (valid when the dilation is larger), though output_padding <
    stride works."""
    adapter = load("onnxruntime")
    caps = adapter.capabilities
    assert caps.output_padding and "output_padding<stride" in caps.constraints
    assert caps.admits(TRANSPOSED[1]) and not caps.admits(TRANSPOSED[-1])
    works = TRANSPOSED[1]                          # output_padding 1 < stride 2
    x, w, b, _ = draw(works)
    got = adapter.target.transposed(x, w, b, stride=works.stride, padding=works.padding,
                                    dilation=works.dilation, groups=works.groups,
                                    output_padding=works.output_padding)
    check(adapter, works, "transposed", got, ref.transposed(works, x, w, b),
          ref.forward_magnitude(works, x, w, b), with_bias=works.bias)
    refused = TRANSPOSED[-1]                       # output_padding 1 >= stride 1, dilation 2
    x, w, b, _ = draw(refused)
    with pytest.raises(Exception, match="output_padding"):
        adapter.target.transposed(x, w, b, stride=refused.stride, padding=refused.padding,
                                  dilation=refused.dilation, groups=refused.groups,
                                  output_padding=refused.output_padding)


@pytest.mark.parametrize("spec", [CONV[1], CONV[2], TRANSPOSED[2]], ids=["2d", "3d", "3d-transposed"])
def test_torch_channels_last_reaches_torch_as_channels_last_memory(monkeypatch, spec):
    """For 2-D/3-D channels_last (offered, not claimed) torch receives NC(D)HW tensors in
    channels_last / channels_last_3d memory, so its channels-last kernels run, and they
    agree with the reference here (torch memory formats)."""
    torch = pytest.importorskip("torch")
    F = torch.nn.functional
    fmt = torch.channels_last if spec.ndim == 2 else torch.channels_last_3d
    name = f"conv{'_transpose' if spec.transposed else ''}{spec.ndim}d"
    seen = []
    real = getattr(F, name)

    def recording(x, w, *args, **kwargs):
        y = real(x, w, *args, **kwargs)
        seen.append((x.is_contiguous(memory_format=fmt), w.is_contiguous(memory_format=fmt),
                     y.is_contiguous(memory_format=fmt)))
        return y

    monkeypatch.setattr(F, name, recording)
    from convwitness.adapters.torch_nn import TorchAdapter
    adapter = convwitness.wrap(TorchAdapter())
    spec = spec.replace(layout="channels_last")
    x, w, b, _ = draw(spec)
    check(adapter, spec, "transposed" if spec.transposed else "forward", adapter.run(spec, x, w, b),
          ref.forward(spec, x, w, b), ref.forward_magnitude(spec, x, w, b), with_bias=spec.bias)
    assert seen == [(True, True, True)], seen


# -- real-library findings: what convwitness does with them ------------------------------
# Whether a library bug reproduces depends on the machine (CPU instruction sets, thread
# count): scripts/library_findings.py prints each finding, whether it holds here, and the
# environment. The tests below do not depend on it: they check only that the adapter's
# claims leave the finding out and that convwitness judges the finding's case by what
# the library really returned on this machine.

def _ones_correlation(spec):
    """The exact forward result for x = w = ones, bias none, nonnegative padding, by
    scipy.signal.correlate (source: scipy, independent of convwitness's reference)."""
    signal = pytest.importorskip("scipy.signal")
    x = np.ones(spec.x_shape[2:] if spec.layout == "channels_first" else spec.x_shape[1:-1])
    x = np.pad(x, spec.padding)
    k = np.ones(spec.kernel_size)
    full = signal.correlate(x, k, mode="valid", method="direct")
    return full[tuple(slice(None, None, s) for s in spec.stride)]


def _recorded_forward_verdict(adapter, spec, monkeypatch):
    """(forward.reference's verdict, the output the adapter returned to it) on ones."""
    from convwitness.cases.case import Case
    from convwitness.invariants import Context, get
    dt = numpy_dtype(spec.dtype)
    case = Case(spec, np.ones(spec.x_shape, dt), np.ones(spec.w_shape, dt), None,
                np.ones(spec.y_shape, dt), "ones", 0)
    seen = []
    real = adapter.forward

    def recording(*args, **kwargs):
        y = real(*args, **kwargs)
        seen.append(np.array(y, copy=True))
        return y

    monkeypatch.setattr(adapter, "forward", recording)
    ev = get("forward.reference").check(adapter, case, Context())
    assert seen, "forward.reference did not call the adapter"
    return ev, seen[0]


def test_torch_does_not_claim_channels_last():
    """Finding torch.channels_last_c1 (scripts/library_findings.py): TorchAdapter leaves
    channels_last unclaimed, and the adapter that claims it is a separate one."""
    assert "channels_last" not in load("torch").capabilities.layouts
    assert "channels_last" in load("torch-channels-last").capabilities.layouts


def test_torch_channels_last_finding_case_is_judged_by_what_torch_returned(monkeypatch):
    """On the case of finding torch.channels_last_c1 (NHWC, C_in=1, N=2, stride (1,2)),
    forward.reference passes exactly when torch's output equals the exact correlation of
    ones (scipy.signal.correlate); on ones every correct float32 result is exact, and a
    wrong one is off by a whole term, far beyond any bound. Holds whether or not torch
    gets the case wrong on this machine."""
    adapter = load("torch-channels-last")
    spec = ConvSpec(2, 1, 1, (12, 3), (1, 3), stride=(1, 2), bias=False, layout="channels_last")
    ev, y = _recorded_forward_verdict(adapter, spec, monkeypatch)
    exact = _ones_correlation(spec)                     # (12, 1) per batch, per channel
    right = np.array_equal(y.astype(np.float64), np.broadcast_to(exact[None, :, :, None], y.shape))
    assert ev.ok == right, (ev.message, y.ravel().tolist())


_TORCH_FP16_CASE = """
import torch
F = torch.nn.functional
x = torch.full((1, 1, 2, 1), 1.5, dtype=torch.float16)
w = torch.ones((1, 1, 1, 2), dtype=torch.float16)
F.conv2d(x, w, None, stride=(1, 2), padding=(0, 3), dilation=(1, 2))
"""


def test_torch_float16_finding_case_gets_crash_verdict_exactly_when_torch_dies():
    """Finding torch.float16_sigsegv (scripts/library_findings.py): TorchAdapter keeps
    its float16 claim, and under process isolation convwitness calls the case a crash
    exactly when the same call, run directly in a child process, dies (source: the
    child's return code). Holds whether or not this machine's torch crashes."""
    pytest.importorskip("torch")
    from convwitness.boundary.isolation.client import load_isolated
    from convwitness.errors import AdapterCrashed
    assert "float16" in load("torch").capabilities.dtypes
    res = subprocess.run([sys.executable, "-c", _TORCH_FP16_CASE], capture_output=True, timeout=300)
    died = res.returncode != 0
    spec = ConvSpec(1, 1, 1, (2, 1), (1, 2), stride=(1, 2), padding=((0, 0), (3, 3)),
                    dilation=(1, 2), bias=False, dtype="float16")
    adapter = load_isolated("torch", call_timeout=120)
    try:
        adapter.forward(spec, np.full(spec.x_shape, 1.5, np.float16), np.ones(spec.w_shape, np.float16))
        crashed = False
    except AdapterCrashed:
        crashed = True
    finally:
        adapter.close()
    assert crashed == died, (res.returncode, res.stderr[-500:])


def test_onnxruntime_sessions_stay_bounded_in_a_long_run():
    """Each onnxruntime InferenceSession owns an intra-op thread pool (per-session pools
    unless global ones are set: onnxruntime docs, "Thread management", from memory; measured
    here as one more live thread per session on 2 cores); with one
    session per geometry an unbounded cache ran a standard-profile run out of threads
    ("pthread_create failed ... Cannot allocate memory"; `convwitness run --adapter
    onnxruntime --profile standard --seed 1`, onnxruntime 1.32.0, this 2-core CPU machine).
    The cache keeps the most recent sessions, and the live threads stay bounded."""
    pytest.importorskip("onnxruntime")
    from adapters.onnxruntime_node import MAX_SESSIONS, OnnxRuntimeAdapter
    inner = OnnxRuntimeAdapter()
    x, w = np.ones((1, 1, 8), np.float32), np.ones((1, 1, 2), np.float32)
    threads = lambda: len(os.listdir("/proc/self/task"))   # noqa: E731 (Linux)
    for i in range(MAX_SESSIONS):
        inner.forward(x, w, None, stride=(1,), padding=((i % 7, i // 7),), dilation=(1,), groups=1)
    full = threads()
    for i in range(MAX_SESSIONS, 3 * MAX_SESSIONS):
        y = inner.forward(x, w, None, stride=(1,), padding=((i % 7, i // 7),), dilation=(1,), groups=1)
        assert y.shape == (1, 1, 7 + i % 7 + i // 7)
    assert len(inner._sessions) == MAX_SESSIONS
    assert threads() <= full + 2          # evicted sessions took their threads with them
