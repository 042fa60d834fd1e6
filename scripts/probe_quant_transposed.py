"""What the quantized suite found in torch's quantized transposed convolution, reproduced
on one tiny case without hypothesis, with the environment printed first.

Run: python3 scripts/probe_quant_transposed.py

The case is the shape of the minimal witness of ``quantized.padding_zero`` on the
``torch-quant-transposed`` adapter (convT1d, C_in=2 -> C_out=3, length 2, k=3, stride 1,
padding 1, output_padding 0, uint8 x zero point 0, per-tensor int8 weights; small values, so that nothing saturates). For each
quantized engine of this torch build the line prints the largest |y - exact| in output
units and the deviation the float32 requantization model allows (convwitness's exact
int64 reference, numerics/requant.py).
"""
import platform
import warnings

import numpy as np

from convwitness.adapters.torch_quant import TorchQuantTransposed
from convwitness.boundary.contract import wrap
from convwitness.geometry.quant import QuantSpec
from convwitness.geometry.spec import ConvSpec
from convwitness.numerics import requant as rq

warnings.filterwarnings("ignore")


def main():
    import torch
    print(f"python {platform.python_version()}, numpy {np.__version__}, torch {torch.__version__}, "
          f"{platform.machine()}, default quantized engine {torch.backends.quantized.engine}")
    conv = ConvSpec(batch=1, in_channels=2, out_channels=3, input_size=(2,), kernel_size=(3,),
                    padding=1, transposed=True, bias=False, dtype="float64")
    spec = QuantSpec(conv, x_dtype="uint8", x_zero_point=0, w_scale=(1.0,), w_zero_point=(0,),
                     output="uint8", y_scale=1.0, y_zero_point=128)
    rng = np.random.default_rng(0)
    x = rng.integers(0, 20, spec.x_shape).astype(np.uint8)
    w = rng.integers(-5, 6, spec.w_shape).astype(np.int8)
    exact, acc = rq.reference(spec, x, w)
    allowed = int(rq.deviation(spec, acc, "float32")[0].max())
    print(f"case: {spec.describe()}")
    print(f"exact y: {exact.tolist()}")
    for engine in torch.backends.quantized.supported_engines:
        if engine == "none":
            continue
        try:
            y = wrap(TorchQuantTransposed(engine=engine)).quantized(spec, x, w)
        except Exception as exc:         # an engine this build cannot run here
            print(f"engine {engine:8s}: raised {type(exc).__name__}: {str(exc).splitlines()[0][:100]}")
            continue
        diff = int(np.abs(y.astype(np.int64) - exact).max())
        print(f"engine {engine:8s}: y {y.tolist()}  max |y - exact| = {diff} (float32 model allows {allowed})")


if __name__ == "__main__":
    main()
