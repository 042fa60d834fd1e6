"""What the quantized suite found in onnxruntime and torch, reproduced on three tiny cases
without hypothesis, with the environment printed first.

Run: python3 scripts/probe_quant.py

1. onnxruntime ConvInteger with a per-output-channel weight zero point: refused.
2. onnxruntime QLinearConv on a near-tie: the exact multiplier is 1/2 (1 + eps) but
   x_scale*w_scale/y_scale computed in float32 is 1/2 exactly, so an exact tie is
   rounded half to even where the exact value lies above the tie.
3. torch's quantized conv1d (quantized engine as configured) on an exact tie with an odd
   output zero point: the ONNX QuantizeLinear rule (https://onnx.ai/onnx/operators/onnx__QuantizeLinear)
   is round(v) + zp, half to even; adding the zero point before rounding gives another
   integer when zp is odd.
Each line prints the library's answer and the exact one of convwitness's reference.
"""
import platform
import sys
import warnings

import numpy as np

from convwitness.geometry.quant import QuantSpec
from convwitness.geometry.spec import ConvSpec
from convwitness.numerics import requant as rq

warnings.filterwarnings("ignore")


def env():
    parts = [f"python {platform.python_version()}", f"numpy {np.__version__}", platform.machine()]
    for mod in ("onnxruntime", "onnx", "torch"):
        try:
            parts.append(f"{mod} {__import__(mod).__version__}")
        except ImportError:
            parts.append(f"{mod} not installed")
    try:
        import torch
        parts.append(f"torch quantized engine {torch.backends.quantized.engine}")
    except ImportError:
        pass
    print("environment:", ", ".join(parts))


def conv1():
    return ConvSpec(batch=1, in_channels=1, out_channels=1, input_size=(1,),
                    kernel_size=(1,), bias=False, dtype="float64")


def ort_conv_integer_per_channel():
    from convwitness.adapters.onnxruntime_quant import QuantOnnxRuntime
    a = QuantOnnxRuntime()
    x = np.array([[[3]]], np.uint8)
    w = np.array([[[1]], [[2]]], np.int8)
    try:
        y = a.quantized(x, w, None, stride=(1,), padding=((0, 0),), dilation=(1,), groups=1, x_scale=1.0,
                        x_zero_point=0, w_scale=(1.0,), w_zero_point=(0, 1), y_scale=None,
                        y_zero_point=0, output="int32", clamp=None)
        print("1. onnxruntime ConvInteger per-channel w_zero_point (0, 1): y =", y.ravel().tolist(),
              "exact", [3, 3])
    except Exception as exc:
        print("1. onnxruntime ConvInteger per-channel w_zero_point (0, 1): refused:",
              str(exc).splitlines()[0][-160:])


def ort_qlinear_near_tie():
    from convwitness.adapters.onnxruntime_quant import QuantOnnxRuntime
    xs = ws = float(np.float32(0.5 * (1 + 2.0 ** -22)))
    ys = float(np.float32(xs * ws * 2))
    spec = QuantSpec(conv1(), x_dtype="int8", x_scale=xs, w_scale=(ws,), output="int8", y_scale=ys)
    x, w = np.array([[[3]]], np.int8), np.array([[[3]]], np.int8)
    y = QuantOnnxRuntime().quantized(x, w, None, stride=(1,), padding=((0, 0),), dilation=(1,), groups=1,
                                     x_scale=xs, x_zero_point=0, w_scale=(ws,), w_zero_point=(0,),
                                     y_scale=ys, y_zero_point=0, output="int8", clamp=None)
    exact, acc = rq.reference(spec, x, w)
    print(f"2. onnxruntime QLinearConv acc=9, M=x_s*w_s/y_s={float(rq.multipliers(spec)[0])!r} "
          f"(float32: 0.5): y = {int(y.ravel()[0])}, exact {int(exact.ravel()[0])}")


def torch_tie_with_odd_zero_point():
    try:
        from convwitness.adapters.torch_quant import TorchQuant
        a = TorchQuant()
    except Exception as exc:
        print("3. torch quantized conv: unavailable:", exc)
        return
    spec = QuantSpec(conv1(), x_dtype="uint8", output="uint8", y_scale=2.0, y_zero_point=1)
    x, w = np.array([[[3]]], np.uint8), np.array([[[1]]], np.int8)
    y = a.quantized(x, w, None, stride=(1,), padding=((0, 0),), dilation=(1,), groups=1, x_scale=1.0,
                    x_zero_point=0, w_scale=(1.0,), w_zero_point=(0,), y_scale=2.0, y_zero_point=1,
                    output="uint8", clamp=None)
    exact, _ = rq.reference(spec, x, w)
    print(f"3. torch ({a.engine}) acc=3, M=1/2, y_zp=1: y = {int(y.ravel()[0])}, exact "
          f"round_half_even(1.5)+1 = {int(exact.ravel()[0])}")


if __name__ == "__main__":
    env()
    ort_conv_integer_per_channel()
    ort_qlinear_near_tie()
    torch_tie_with_odd_zero_point()
    sys.exit(0)
