"""The ``onnx-reference`` adapter: onnx's ReferenceEvaluator against the float64 reference.

Outside sources: the ``onnx`` package itself (its operator schemas, ``onnx.defs``, and
its reference evaluator, ``onnx.reference.ReferenceEvaluator``); the float64 reference
(convwitness.numerics.reference) is checked against torch/scipy in
test_reference_vs_libraries.py; bounds are Higham 2002, Lemma 3.1 (gamma_n) through
convwitness.numerics.bounds.derive. Every test skips, saying why, without onnx.

Deviations found in onnx 1.23.2 (reproduced by scripts/probe_onnx_reference.py, seen
with python 3.11.7, numpy 2.4.6, onnx 1.23.2, ml_dtypes 0.7.0 on Linux x86_64):
ConvTranspose raises for output_padding >= stride with a larger dilation, for groups
with C_in != C_out, and for batch 0, and adds the first group's bias entries to every
group. The last test pins that the suite reports the first of them; after an onnx
upgrade it fails if the deviation is gone (then rerun the script and update the
adapter's docstring and this note).
"""
from __future__ import annotations

import subprocess
import sys
import textwrap

import numpy as np
import pytest

import convwitness
from convwitness import AdapterUnavailable, ConvSpec
from convwitness.geometry.formats import numpy_dtype
from convwitness.numerics import reference as ref
from convwitness.numerics.bounds import derive

onnx = pytest.importorskip("onnx", reason="onnx is not installed (pip install 'convwitness[onnx-reference]')")

# geometries the evaluator gets right (the deviations above are left out here)
CONV = [
    ConvSpec(2, 4, 6, (9,), (3,), stride=2, padding=((1, 2),), dilation=2, groups=2),
    ConvSpec(1, 3, 3, (7, 6), (3, 3), stride=(2, 1), padding=1, groups=3),
    ConvSpec(2, 2, 4, (5, 6, 4), (2, 3, 2), stride=(1, 2, 2), padding=((0, 1), (1, 0), (0, 0)),
             dilation=(2, 1, 1)),
    ConvSpec(0, 2, 2, (5, 5), (3, 3), padding=1),
    ConvSpec(3, 4, 2, (6,), (1,), bias=False),
]
TRANSPOSED = [
    ConvSpec(2, 3, 5, (5, 4), (3, 2), stride=(2, 3), padding=((1, 2), (0, 1)), dilation=(2, 1),
             transposed=True, output_padding=(1, 2)),
    ConvSpec(1, 3, 2, (4,), (3,), stride=2, padding=1, transposed=True, output_padding=1, bias=False),
    ConvSpec(1, 2, 3, (3, 2, 2), (2, 2, 2), stride=2, transposed=True),
]


@pytest.fixture(scope="module")
def adapter():
    try:
        return convwitness.load_adapter("onnx-reference")
    except AdapterUnavailable as exc:
        pytest.skip(str(exc))


def _draw(spec, seed):
    rng = np.random.default_rng(seed)
    dt = numpy_dtype(spec.dtype)
    x = rng.standard_normal(spec.x_shape).astype(dt)
    w = rng.standard_normal(spec.w_shape).astype(dt)
    b = rng.standard_normal(spec.out_channels).astype(dt) if spec.bias else None
    return x, w, b


def _check(adapter, spec, pass_, got, expected, magnitude, x, w, b):
    model = adapter.capabilities.error_model_for(spec.dtype, pass_)
    bound = derive(spec, model, pass_, magnitude, expected, with_bias=spec.bias,
                   arrays={"x": x, "w": w, "b": b})
    err = np.abs(got.astype(np.float64) - expected)
    assert (err <= bound.values).all(), (f"{spec.describe()} {pass_}: max error "
                                         f"{err.max():.3g} beyond the bound ({bound.explain()})")


def test_claims_the_dtypes_of_the_operator_schema(adapter):
    # source: onnx.defs, the Conv/ConvTranspose schemas at opset 22 (type constraint T)
    from convwitness.adapters.onnx_reference import claimed_dtypes
    schema = set(onnx.defs.get_schema("Conv", 22).type_constraints[0].allowed_type_strs)
    assert "tensor(float)" in schema and "tensor(double)" in schema
    assert claimed_dtypes(onnx.defs) <= {"float64", "float32", "float16", "bfloat16"}
    assert {"float64", "float32", "float16"} <= adapter.capabilities.dtypes
    assert adapter.capabilities.passes == {"forward", "transposed"}
    assert adapter.version == onnx.__version__


@pytest.mark.parametrize("geometry", range(len(CONV)))
def test_forward_agrees_with_reference(adapter, geometry):
    for dtype in sorted(adapter.capabilities.dtypes):
        spec = CONV[geometry].replace(dtype=dtype)
        x, w, b = _draw(spec, geometry)
        _check(adapter, spec, "forward", adapter.forward(spec, x, w, b), ref.forward(spec, x, w, b),
               ref.forward_magnitude(spec, x, w, b), x, w, b)


@pytest.mark.parametrize("geometry", range(len(TRANSPOSED)))
def test_transposed_agrees_with_reference(adapter, geometry):
    for dtype in sorted(adapter.capabilities.dtypes):
        spec = TRANSPOSED[geometry].replace(dtype=dtype)
        x, w, b = _draw(spec, geometry)
        _check(adapter, spec, "transposed", adapter.transposed(spec, x, w, b),
               ref.transposed(spec, x, w, b), ref.forward_magnitude(spec, x, w, b), x, w, b)


@pytest.mark.parametrize("dtype", ["float16", "bfloat16"])
def test_low_precision_sums_are_wider_than_the_dtype(adapter, dtype):
    # the declared model sums float16/bfloat16 in float32: channels 2^e, 1, -2^e give
    # exactly 1 only when partial sums keep e + 1 bits (convwitness's precision probe);
    # e = 13 needs more bits than float16 (11) or bfloat16 (8) hold
    if dtype not in adapter.capabilities.dtypes:
        pytest.skip(f"{dtype} is not claimed here (ml_dtypes missing)")
    assert adapter.capabilities.error_model_for(dtype, "forward").accumulate == "float32"
    spec = ConvSpec(1, 64, 1, (1,), (1,), bias=False, dtype=dtype)
    xs = np.zeros(64)
    xs[0], xs[1], xs[-1] = 2.0 ** 13, 1.0, -(2.0 ** 13)
    dt = numpy_dtype(dtype)
    y = adapter.forward(spec, xs.astype(dt).reshape(spec.x_shape), np.ones(spec.w_shape, dtype=dt))
    assert float(y.ravel()[0]) == 1.0


def test_the_probe_and_the_reference_invariants_pass_on_the_forward_pass():
    report = convwitness.certify("onnx-reference", only="precision.probe,forward.reference",
                                 isolation="none")
    assert report.conformant, [(r["id"], r["message"]) for r in report.failures]


def test_the_suite_reports_the_transposed_deviation():
    report = convwitness.certify("onnx-reference", only="transposed.reference", isolation="none")
    (result,) = report.results
    assert result["verdict"] == "error", result
    (w,) = report.witnesses
    case, _ = w.load()
    # the witness is a valid geometry the evaluator refuses (ValueError for output padding
    # or groups, TypeError for batch 0, whichever the search reaches): check it on onnx
    from convwitness.adapters.onnx_reference import OnnxReferenceAdapter
    s = case.spec
    with pytest.raises((ValueError, TypeError)):
        OnnxReferenceAdapter().transposed(case.x, case.w, case.b, stride=s.stride, padding=s.padding,
                                          dilation=s.dilation, groups=s.groups,
                                          output_padding=s.output_padding)


def test_missing_onnx_is_unavailable_with_pip_hint():
    out = subprocess.run([sys.executable, "-c", textwrap.dedent("""
        import sys
        sys.modules["onnx"] = None          # makes `import onnx` raise ImportError
        import convwitness
        try:
            convwitness.load_adapter("onnx-reference")
        except convwitness.AdapterUnavailable as exc:
            print("UNAVAILABLE:", exc)
        """)], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    line = out.stdout.strip()
    assert line.startswith("UNAVAILABLE:") and "pip install 'convwitness[onnx-reference]'" in line, line
