"""What convwitness found in onnx's reference evaluator (onnx.reference.ReferenceEvaluator),
reproduced without convwitness: one-node Conv / ConvTranspose models against a naive
float64 loop written here from the definition (cross-correlation; the transposed
convolution scatters x[i] * w[k] to output i*s + k*d - p_lo, then crops).

Run: python3 scripts/probe_onnx_reference.py   (needs onnx and numpy; ml_dtypes for bfloat16)
It prints the environment, then one block per finding with what came and what the
definition gives.
"""
import platform
import sys

import numpy as np
import onnx
from onnx import TensorProto, helper
from onnx.reference import ReferenceEvaluator

ELEM = {np.dtype("float64"): TensorProto.DOUBLE, np.dtype("float32"): TensorProto.FLOAT,
        np.dtype("float16"): TensorProto.FLOAT16}
try:
    import ml_dtypes
    ELEM[np.dtype(ml_dtypes.bfloat16)] = TensorProto.BFLOAT16
except ImportError:
    ml_dtypes = None


def run(op, x, w, b=None, **attrs):
    names = ["X", "W"] + (["B"] if b is not None else [])
    elem = ELEM[x.dtype]
    node = helper.make_node(op, names, ["Y"], **attrs)
    graph = helper.make_graph([node], "g", [helper.make_tensor_value_info(n, elem, None) for n in names],
                              [helper.make_tensor_value_info("Y", elem, None)])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 22)])
    model.ir_version = 10
    feed = {"X": x, "W": w} | ({"B": b} if b is not None else {})
    return ReferenceEvaluator(model).run(None, feed)[0]


def conv_t_1d(x, w, b, stride, pads, dilation, groups, output_padding):
    """Naive float64 transposed convolution, 1-D, channels first, w (C_in, C_out/G, k)."""
    n, cin, length = x.shape
    _, per_group, k = w.shape
    cout = per_group * groups
    full = stride * (length - 1) + dilation * (k - 1) + 1 + output_padding
    y = np.zeros((n, cout, full))
    for c in range(cin):
        g = c // (cin // groups)
        for o in range(per_group):
            for i in range(length):
                for t in range(k):
                    y[:, g * per_group + o, i * stride + t * dilation] += x[:, c, i] * w[c, o, t]
    y = y[:, :, pads[0]: full - pads[1]]
    if b is not None:
        y += np.asarray(b, dtype=np.float64)[None, :, None]
    return y


def attempt(f):
    try:
        return f(), None
    except Exception as exc:  # noqa: BLE001 - the evaluator's own error is the finding
        return None, f"{type(exc).__name__}: {str(exc)[:160]}"


print(f"python {sys.version.split()[0]}, numpy {np.__version__}, onnx {onnx.__version__}, "
      f"ml_dtypes {getattr(ml_dtypes, '__version__', 'absent')}, {platform.platform()}")

print("\n1. ConvTranspose, output_padding >= stride while dilation > output_padding "
      "(a valid geometry: output_padding < max(stride, dilation))")
x, w = np.ones((1, 1, 1)), np.ones((1, 1, 2))
got, err = attempt(lambda: run("ConvTranspose", x, w, strides=[1], dilations=[2], pads=[0, 0],
                               output_padding=[1]))
print(f"   x (1,1,1) ones, w (1,1,2) ones, stride 1, dilation 2, output_padding 1")
print(f"   expected {conv_t_1d(x, w, None, 1, (0, 0), 2, 1, 1).ravel().tolist()}; got "
      f"{err or got.ravel().tolist()}")

print("\n2. ConvTranspose with groups > 1 and C_in != C_out raises")
x, w = np.ones((1, 4, 1)), np.ones((4, 1, 1))
got, err = attempt(lambda: run("ConvTranspose", x, w, group=2))
print(f"   x (1,4,1), w (4,1,1), group 2 (C_in 4 -> C_out 2): expected "
      f"{conv_t_1d(x, w, None, 1, (0, 0), 1, 2, 0).ravel().tolist()}; got {err or got.ravel().tolist()}")

print("\n3. ConvTranspose with groups > 1 and a bias: every group gets the first bias entries")
rng = np.random.default_rng(0)
x, w, b = rng.standard_normal((1, 3, 4)), rng.standard_normal((3, 1, 3)), np.array([10.0, 20.0, 30.0])
got, err = attempt(lambda: run("ConvTranspose", x, w, b, group=3))
want = conv_t_1d(x, w, b, 1, (0, 0), 1, 3, 0)
if err:
    print(f"   raised {err}")
else:
    print(f"   depthwise, 3 channels, bias [10, 20, 30]: max |got - expected| per channel "
          f"{np.abs(got - want).max(axis=(0, 2)).round(6).tolist()} (expected 0 for each)")

print("\n4. ConvTranspose with batch 0 (Conv handles it)")
x, w = np.ones((0, 1, 3)), np.ones((1, 1, 2))
got_c, err_c = attempt(lambda: run("Conv", x, np.ones((1, 1, 2))))
got, err = attempt(lambda: run("ConvTranspose", x, w))
print(f"   Conv: {err_c or f'shape {got_c.shape}'}; ConvTranspose: {err or f'shape {got.shape}'} "
      "(expected shape (0, 1, 4))")

print("\n5. Conv with dilation: NaN on a position no tap reads reaches the output "
      "(the dilated kernel is materialised with zeros, and 0 * NaN = NaN)")
x = np.array([[[1.0, np.nan, 1.0]]])
got = run("Conv", x, np.ones((1, 1, 2)), dilations=[2])
print(f"   x [1, NaN, 1], w [1, 1], dilation 2: expected [2.0] (taps read x[0], x[2]); got "
      f"{got.ravel().tolist()}")

print("\n6. Accumulation formats (precision probe: channels 2^e, 1, -2^e sum to 1 exactly "
      "while partial sums keep e + 1 bits)")
dtypes = [np.dtype("float16"), np.dtype("float32")] + ([np.dtype(ml_dtypes.bfloat16)] if ml_dtypes else [])
for dt in dtypes:
    kept = None
    for e in range(1, 40):
        big = 2.0 ** e
        with np.errstate(over="ignore"):
            if not np.isfinite(np.asarray(big, dtype=np.float64).astype(dt)):
                break
        xs = np.zeros(64)
        xs[0], xs[1], xs[-1] = big, 1.0, -big
        y = run("Conv", xs.astype(dt).reshape(1, 64, 1), np.ones((1, 64, 1), dtype=dt))
        if float(y.ravel()[0]) != 1.0:
            kept = e
            break
    what = (f"partial sums keep {kept} bits (2^{kept} + 1 was rounded)" if kept
            else f"partial sums keep at least {e} bits (2^{e} overflows {dt.name} or the probe ended)")
    print(f"   Conv {dt.name}: {what}")
