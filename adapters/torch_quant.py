"""torch's quantized convolution (CPU, ``torch.ao.nn.quantized.functional.conv{1,2,3}d``).

The integer arrays become quantized tensors as they are (``_make_per_tensor_quantized_tensor``
/ ``_make_per_channel_quantized_tensor`` on the int8/uint8 values; per-channel along
axis 0 = output channels), and the output's integer representation (``int_repr()``)
comes back. Claims, each from torch's own refusals or signature:

* activations uint8 only ("Only torch.quint8 is supported for activation tensor!",
  seen with torch 2.13.0+cpu), output uint8 (quint8) only, no int32 output;
* bias none or float (torch takes a float bias; the reference rounds it to the
  accumulator scale x_scale*w_scale[o], half to even; the float32 model's deviation
  counts the other way, adding it in real terms);
* symmetric padding only (the functional takes one padding per axis); no zero batch;
  no fused clamp;
* layouts channels first and channels last: a channels-last call's arrays are handed
  over as permuted views, which for 2-D and 3-D are exactly torch's ``channels_last`` /
  ``channels_last_3d`` memory formats (the quantized tensors keep them, and so does the
  output: checked with ``is_contiguous(memory_format=...)``, torch 2.13.0+cpu); for 1-D,
  where torch has no channels-last format, the permuted view is what a user would pass;
* requantization model float32 (fbgemm/x86 engine: a float multiplier; recalled from
  memory, and what ``quantized.requantization`` measures).

Reproduce: ``convwitness run --adapter torch-quant --profile quick --report /tmp/tq``
(torch 2.13.0+cpu, numpy 2.4.6, Python 3.11, x86-64; quantized engine ``x86``).
"""
from __future__ import annotations

import dataclasses

import numpy as np

from convwitness.errors import AdapterUnavailable
from convwitness.geometry.capabilities import Capabilities
from convwitness.geometry.quant import QuantCapabilities

__all__ = ["TorchQuant", "TorchQuantTransposed", "transposed_fbgemm"]


class TorchQuant:
    """torch.ao.nn.quantized.functional.conv{1,2,3}d on the CPU."""

    name = "torch-quant"

    def __init__(self, model: str = "float32"):
        try:
            import torch
            import torch.ao.nn.quantized.functional as qF
        except ImportError:
            raise AdapterUnavailable("torch is not installed; fix: pip install 'convwitness[torch]' "
                                     "(pin the CPU wheel, see DEVELOPERS.md)") from None
        import warnings
        warnings.filterwarnings("ignore", message=".*quantized tensor creation functions.*")
        self._torch, self._qF = torch, qF
        self.version = torch.__version__
        self.engine = torch.backends.quantized.engine
        self.capabilities = Capabilities(
            padding=frozenset({"symmetric"}), zero_batch=False, passes=frozenset({"quantized"}),
            quant=QuantCapabilities(x_dtypes=frozenset({"uint8"}), outputs=frozenset({"uint8"}),
                                    bias=frozenset({"none", "float"}), clamp=False, model=model,
                                    layouts=frozenset({"channels_first", "channels_last"})))

    def quantized(self, x, w, b, *, stride, padding, dilation, groups, x_scale, x_zero_point,
                  w_scale, w_zero_point, y_scale, y_zero_point, output, clamp,
                  layout="channels_first"):
        torch = self._torch
        last = layout == "channels_last"

        def tensor(a):          # channels last: the (N, *S, C) bytes as a permuted NC* view
            t = torch.from_numpy(a.copy())
            return t.movedim(-1, 1) if last else t
        if any(lo != hi for lo, hi in padding):
            raise ValueError(f"padding={padding}: torch's quantized conv takes symmetric padding only")
        xq = torch._make_per_tensor_quantized_tensor(tensor(x), float(x_scale),
                                                     int(x_zero_point))
        wt = tensor(w)
        if len(w_scale) > 1 or len(w_zero_point) > 1:
            cout = w.shape[0]
            sc = torch.tensor(np.broadcast_to(np.asarray(w_scale, dtype=np.float64), (cout,)).copy())
            zp = torch.tensor(np.broadcast_to(np.asarray(w_zero_point, dtype=np.int64), (cout,)).copy())
            wq = torch._make_per_channel_quantized_tensor(wt, sc, zp, 0)
        else:
            wq = torch._make_per_tensor_quantized_tensor(wt, float(w_scale[0]), int(w_zero_point[0]))
        fn = {1: self._qF.conv1d, 2: self._qF.conv2d, 3: self._qF.conv3d}[x.ndim - 2]
        bias = None if b is None else torch.from_numpy(b.astype(np.float32))
        y = fn(xq, wq, bias, stride=tuple(stride), padding=tuple(lo for lo, _ in padding),
               dilation=tuple(dilation), groups=groups, scale=float(y_scale),
               zero_point=int(y_zero_point), dtype=torch.quint8)
        y = y.int_repr()
        return np.ascontiguousarray((y.movedim(1, -1) if last else y).numpy()).astype(np.uint8)


class TorchQuantTransposed(TorchQuant):
    """torch's quantized transposed convolution on the CPU: ``torch.ops.quantized.
    conv_transpose{1,2,3}d_prepack`` and ``conv_transpose{1,2,3}d``, the operators behind
    ``torch.ao.nn.quantized.ConvTranspose{1,2,3}d`` (x ``(N, C_in, *S)``, w
    ``(C_in, C_out/G, *K)``). Claims as for the forward adapter, plus: transposed only,
    channels first only, per-tensor weights only ("Per Channel Quantization is currently
    disabled for transposed conv", torch 2.13.0+cpu). ``engine`` picks the quantized
    engine for the calls (None: torch's default, ``x86`` here); it is set around each
    call and restored.
    """

    name = "torch-quant-transposed"

    def __init__(self, model: str = "float32", engine: str | None = None):
        super().__init__(model)
        torch = self._torch
        if engine is not None and engine not in torch.backends.quantized.supported_engines:
            raise AdapterUnavailable(f"quantized engine {engine!r} is not in this torch build "
                                     f"(supported: {torch.backends.quantized.supported_engines})")
        self.engine = engine or torch.backends.quantized.engine
        if engine is not None:
            self.name = f"torch-quant-transposed-{engine}"
        self.version = f"{torch.__version__} (engine {self.engine})"
        quant = dataclasses.replace(self.capabilities.quant, per_channel=False,
                                    layouts=frozenset({"channels_first"}),
                                    directions=frozenset({"transposed"}))
        self.capabilities = self.capabilities.replace(quant=quant)

    def quantized(self, x, w, b, *, stride, padding, dilation, groups, x_scale, x_zero_point,
                  w_scale, w_zero_point, y_scale, y_zero_point, output, clamp, output_padding,
                  transposed=True):
        torch = self._torch
        if any(lo != hi for lo, hi in padding):
            raise ValueError(f"padding={padding}: torch's quantized conv takes symmetric padding only")
        nd = x.ndim - 2
        xq = torch._make_per_tensor_quantized_tensor(torch.from_numpy(x.copy()), float(x_scale),
                                                     int(x_zero_point))
        wq = torch._make_per_tensor_quantized_tensor(torch.from_numpy(w.copy()), float(w_scale[0]),
                                                     int(w_zero_point[0]))
        bias = None if b is None else torch.from_numpy(b.astype(np.float32))
        before = torch.backends.quantized.engine
        torch.backends.quantized.engine = self.engine
        try:
            ops = torch.ops.quantized
            packed = getattr(ops, f"conv_transpose{nd}d_prepack")(
                wq, bias, list(stride), [lo for lo, _ in padding], list(output_padding),
                list(dilation), groups)
            y = getattr(ops, f"conv_transpose{nd}d")(xq, packed, float(y_scale), int(y_zero_point))
        finally:
            torch.backends.quantized.engine = before
        return y.int_repr().numpy().astype(np.uint8)


def transposed_fbgemm():
    return TorchQuantTransposed(engine="fbgemm")
