"""The ``tensorflow`` adapter: tf.nn convolutions and GradientTape gradients against the
float64 reference.

Outside sources: TensorFlow itself (tensorflow-cpu; ``tf.nn.convolution``,
``tf.nn.conv_transpose``, ``tf.GradientTape``); the float64 reference
(convwitness.numerics.reference, checked against torch/scipy in
test_reference_vs_libraries.py); bounds from Higham 2002, Lemma 3.1, through
convwitness.numerics.bounds.derive with the adapter's declared models. Every test skips,
saying why, without tensorflow.

The geometries include each workaround of the adapter (stride with dilation, 3-D groups,
grouped float64 gradients, dilated float64 transposed convolution, 3-D gradients in a
tf.function) and both layouts. The zero-batch test pins a TensorFlow bug seen with
tensorflow-cpu 2.21.0, numpy 2.4.6, python 3.11.7 on Linux x86_64 (reproduce:
python scripts/probe_tensorflow.py); after a TensorFlow upgrade it fails if the bug is gone.
"""
from __future__ import annotations

import subprocess
import sys
import textwrap

import numpy as np
import pytest

import convwitness
from convwitness import AdapterOutputError, AdapterUnavailable, ConvSpec
from convwitness.geometry.formats import numpy_dtype
from convwitness.numerics import reference as ref
from convwitness.numerics.bounds import derive

pytest.importorskip("tensorflow", reason="tensorflow is not installed (pip install 'convwitness[tensorflow]')")

CONV = [
    ConvSpec(2, 4, 6, (9,), (3,), stride=2, padding=((1, 2),), dilation=2, groups=2),
    ConvSpec(1, 3, 3, (7, 6), (3, 3), stride=(2, 1), padding=1, groups=3),
    ConvSpec(2, 4, 4, (5, 6, 4), (2, 3, 2), stride=(1, 2, 2), padding=((0, 1), (1, 0), (0, 0)),
             dilation=(2, 1, 1), groups=2),
    ConvSpec(3, 4, 2, (6,), (1,), bias=False),
]
TRANSPOSED = [
    ConvSpec(2, 4, 6, (5, 4), (3, 2), stride=(2, 3), padding=((1, 2), (0, 1)), dilation=(2, 1),
             groups=2, transposed=True, output_padding=(1, 2)),
    ConvSpec(1, 3, 2, (4,), (3,), stride=2, padding=1, transposed=True, output_padding=1, bias=False),
    ConvSpec(1, 2, 3, (4,), (2,), dilation=2, output_padding=1, transposed=True),
]


@pytest.fixture(scope="module")
def adapter():
    try:
        return convwitness.load_adapter("tensorflow")
    except AdapterUnavailable as exc:
        pytest.skip(str(exc))


def _draw(spec, seed):
    rng = np.random.default_rng(seed)
    dt = numpy_dtype(spec.dtype)
    x = rng.standard_normal(spec.x_shape).astype(dt)
    w = rng.standard_normal(spec.w_shape).astype(dt)
    b = rng.standard_normal(spec.out_channels).astype(dt) if spec.bias else None
    gy = rng.standard_normal(spec.y_shape).astype(dt)
    return x, w, b, gy


def _check(adapter, spec, pass_, got, expected, magnitude, with_bias=False, arrays=None):
    model = adapter.capabilities.error_model_for(spec.dtype, pass_)
    bound = derive(spec, model, pass_, magnitude, expected, with_bias=with_bias, arrays=arrays)
    err = np.abs(got.astype(np.float64) - expected)
    assert (err <= bound.values).all(), (f"{spec.describe()} {pass_}: max error {err.max():.3g} "
                                         f"beyond the bound ({bound.explain()})")


@pytest.mark.parametrize("dtype", ["float64", "float32", "float16"])
@pytest.mark.parametrize("layout", ["channels_first", "channels_last"])
@pytest.mark.parametrize("geometry", range(len(CONV)))
def test_forward_and_backward_agree_with_reference(adapter, geometry, layout, dtype):
    spec = CONV[geometry].replace(dtype=dtype, layout=layout)
    x, w, b, gy = _draw(spec, geometry)
    _check(adapter, spec, "forward", adapter.forward(spec, x, w, b), ref.forward(spec, x, w, b),
           ref.forward_magnitude(spec, x, w, b), with_bias=spec.bias, arrays={"x": x, "w": w, "b": b})
    gx, gw, gb = adapter.backward(spec, x, w, b, gy)
    _check(adapter, spec, "grad_input", gx, ref.grad_input(spec, w, gy), ref.grad_input_magnitude(spec, w, gy))
    _check(adapter, spec, "grad_weight", gw, ref.grad_weight(spec, x, gy),
           ref.grad_weight_magnitude(spec, x, gy))
    if spec.bias:
        _check(adapter, spec, "grad_bias", gb, ref.grad_bias(spec, gy), ref.grad_bias_magnitude(spec, gy))
    else:
        assert gb is None


@pytest.mark.parametrize("dtype", ["float64", "float32", "float16"])
@pytest.mark.parametrize("layout", ["channels_first", "channels_last"])
@pytest.mark.parametrize("geometry", range(len(TRANSPOSED)))
def test_transposed_agrees_with_reference(adapter, geometry, layout, dtype):
    spec = TRANSPOSED[geometry].replace(dtype=dtype, layout=layout)
    x, w, b, _ = _draw(spec, geometry)
    _check(adapter, spec, "transposed", adapter.transposed(spec, x, w, b), ref.transposed(spec, x, w, b),
           ref.forward_magnitude(spec, x, w, b), with_bias=spec.bias)


def test_identity(adapter):
    import tensorflow as tf
    assert adapter.name == "tensorflow" and adapter.version == tf.__version__
    assert adapter.capabilities.passes == {"forward", "backward", "transposed"}


def test_zero_batch_forward_has_the_wrong_shape(adapter):
    # TensorFlow returns the input's shape for an empty batch (see the module doc)
    spec = ConvSpec(0, 1, 2, (1,), (1,), bias=False)
    x, w, _, _ = _draw(spec, 0)
    with pytest.raises(AdapterOutputError, match=r"expected .*shape=\(0, 2, 1\).*got shape=\(0, 1, 1\)"):
        adapter.forward(spec, x, w, None)


def test_missing_tensorflow_is_unavailable_with_pip_hint():
    out = subprocess.run([sys.executable, "-c", textwrap.dedent("""
        import sys
        sys.modules["tensorflow"] = None          # makes `import tensorflow` raise ImportError
        import convwitness
        try:
            convwitness.load_adapter("tensorflow")
        except convwitness.AdapterUnavailable as exc:
            print("UNAVAILABLE:", exc)
        """)], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    line = out.stdout.strip()
    assert line.startswith("UNAVAILABLE:") and "pip install 'convwitness[tensorflow]'" in line, line


def test_adapter_module_imports_no_library():
    out = subprocess.run([sys.executable, "-c", "import sys, convwitness.adapters.tensorflow_nn, "
                          "convwitness.adapters.onnx_reference; "
                          "print(sorted(m for m in ('tensorflow', 'onnx') if m in sys.modules))"],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"
