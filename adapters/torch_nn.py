"""torch behind the call signature: ``torch.nn.functional`` conv1d/2d/3d and
conv_transpose1d/2d/3d, gradients by autograd.

What the adapter does the way a user would, and what it leaves to torch:

* **padding** -- symmetric, non-negative padding goes to torch's own ``padding=``
  argument. Asymmetric or negative padding (and any padding of a zero-length
  spatial axis, which torch's native padding refuses) is emulated: ``F.pad`` with
  zeros, negative amounts cropping, then a convolution with ``padding=0``. For the
  transposed convolution asymmetric padding is emulated by a ``padding=0``
  ``conv_transpose`` whose output is then cropped by ``(before, after)``.
* **channels_last** -- for 2-D and 3-D the numpy arrays ``(N, *S, C)`` and
  ``(C_out, *K, C_in/G)`` are handed to torch as permuted views, which are
  logically NC(D)HW tensors with ``channels_last`` / ``channels_last_3d`` memory,
  so torch's channels-last kernels run; the output is permuted back. torch has no
  channels-last memory format for 1-D, so there the permuted view is a plain
  strided tensor that torch makes contiguous itself.
  **channels_last is offered but not claimed**: torch 2.13.0 (CPU, oneDNN) returns
  wrong float32 values for channels-last input with ``C_in = 1``, batch >= 2 and a
  last spatial axis that a strided window covers once (output size 1 there), e.g.
  x ``(2, 12, 3, 1)`` NHWC, w ``(1, 1, 3, 1)``, stride ``(1, 2)``: outputs miss terms or come
  back 0 (float64 reference: all 3 for ones); ``.contiguous(memory_format=...)`` does
  not help, channels first is right. Where it holds (finding ``torch.channels_last_c1``,
  reproduce with ``python scripts/library_findings.py torch.channels_last_c1``): AMD
  EPYC with AVX-512, torch 2.13.0+cpu, oneDNN v3.12.0, at 2 intra-op threads; not at 1
  thread, nor with ``ONEDNN_MAX_CPU_ISA=AVX2``; also reported on an AVX2 machine.
* **backward** -- ``torch.autograd.grad`` of the forward graph (``F.pad``
  included) with the given upstream gradient.
* **dtypes** -- float64, float32 and float16 for ``torch``; bfloat16 (ml_dtypes) in
  ``torch-bf16``. (An earlier note here said torch's bfloat16 conv3d misplaces outputs
  for a strided, padded case; it never reproduced -- ``python scripts/library_findings.py
  torch.bfloat16_conv3d``, AMD EPYC with and without AVX-512, 1 and 2 threads -- and is
  withdrawn.) float16 stays claimed although torch 2.13.0 CPU died with SIGSEGV on one
  float16 conv2d (x ``(1, 1, 2, 1)``, w ``(1, 1, 1, 2)``, stride ``(1, 2)``, padding
  ``(0, 3)``, dilation ``(1, 2)``; float32/64 and bfloat16 are fine) on an AVX2 machine
  without AVX-512; on AMD EPYC with AVX-512 it does not crash (finding
  ``torch.float16_sigsegv``, ``python scripts/library_findings.py torch.float16_sigsegv``).
  Where it crashes, the nightly profile reaches it and reports a crash, which is the
  truth about that machine. float16 gradients on torch's own Slow* kernels are summed in
  float16 (finding ``torch.float16_slow_gradients``; see ``_slow_path_backward_models``).
  ml_dtypes' bfloat16 arrays reach torch as their 16-bit patterns reinterpreted as
  ``torch.bfloat16`` (no value conversion), and come back the same way.
* **error model** -- direct summation in the dtype of the case: on CPU torch runs
  oneDNN's direct convolution or im2col + GEMM (``Slow2d``/``Slow3d`` and their
  dilated/transposed variants), all plain sums of products. If
  ``torch.backends.mkldnn.conv.fp32_precision`` (or, where that says ``"none"``,
  ``torch.backends.mkldnn`` / ``torch.backends``) was ``"tf32"`` or ``"bf16"`` when the
  adapter was built, the float32 model declares those operand formats.
  NNPACK (Winograd/FFT) is not selected on CPU builds with oneDNN; a build without
  oneDNN that picks NNPACK would break the declared model.

The adapter changes no global torch setting.
"""
from __future__ import annotations

from functools import lru_cache

import numpy as np

from convwitness.numerics.bounds import ErrorModel
from convwitness.geometry.capabilities import Capabilities
from convwitness.errors import AdapterUnavailable

__all__ = ["TorchAdapter", "torch_bf16", "torch_channels_last"]

TORCH_PIN = "2.13.0"


class _Plan:
    """Everything about one geometry that does not depend on the values."""

    __slots__ = ("native_padding", "pad", "crop", "to_torch", "from_torch", "stride",
                 "dilation", "output_padding", "groups")


@lru_cache(maxsize=1024)
def _plan(ndim, stride, padding, dilation, groups, layout, transposed, output_padding, any_empty):
    p = _Plan()
    p.stride, p.dilation, p.groups = tuple(stride), tuple(dilation), int(groups)
    p.output_padding = tuple(output_padding) if transposed else None
    symmetric = all(lo == hi and lo >= 0 for lo, hi in padding)
    p.pad = None
    p.crop = None
    if symmetric and not (any_empty and not transposed):
        p.native_padding = tuple(lo for lo, _ in padding)
    else:
        p.native_padding = (0,) * ndim
        if transposed:
            p.crop = tuple(padding)
        else:
            # F.pad takes (before, after) pairs starting from the LAST axis.
            flat = []
            for lo, hi in reversed(padding):
                flat += [lo, hi]
            p.pad = tuple(flat)
    if layout == "channels_last":
        p.to_torch = (0, ndim + 1) + tuple(range(1, ndim + 1))
        p.from_torch = (0,) + tuple(range(2, ndim + 2)) + (1,)
    else:
        p.to_torch = p.from_torch = None
    return p


class TorchAdapter:
    """torch.nn.functional convolutions (CPU), with autograd for the gradients."""

    name = "torch"

    def __init__(self, dtypes=("float64", "float32", "float16"), layouts=("channels_first",),
                 name: str | None = None):
        try:
            import torch
            import torch.nn.functional as F
        except ImportError:
            raise AdapterUnavailable(
                f"torch is not installed; fix: pip install torch=={TORCH_PIN}") from None
        self._torch = torch
        self._F = F
        self.version = torch.__version__
        # numpy dtype name -> torch dtype; bfloat16 travels as its bit pattern
        self._TORCH_DTYPES = {"float32": torch.float32, "float64": torch.float64,
                              "float16": torch.float16}
        from convwitness.geometry.formats import available, numpy_dtype
        self._bf16 = numpy_dtype("bfloat16") if available("bfloat16") else None
        if self._bf16 is not None:
            self._TORCH_DTYPES["bfloat16"] = torch.bfloat16
        self._conv = {1: F.conv1d, 2: F.conv2d, 3: F.conv3d}
        self._conv_t = {1: F.conv_transpose1d, 2: F.conv_transpose2d, 3: F.conv_transpose3d}
        models = dict(_low_precision_models())
        models.update(_slow_path_backward_models(torch))
        precision = _mkldnn_fp32_precision(torch)
        if precision in ("tf32", "bf16"):
            operand = "tf32" if precision == "tf32" else "bfloat16"
            models["float32"] = ErrorModel(
                operand=operand, accumulate="float32",
                note=f"oneDNN float32 math mode {precision!r}: operands read as {operand}")
        if name:
            self.name = name
        missing = [d for d in dtypes if d not in self._TORCH_DTYPES]
        if missing:
            raise AdapterUnavailable(f"torch adapter: dtype(s) {missing} need ml_dtypes; fix: "
                                     "pip install 'convwitness[lowp]'")
        self.capabilities = Capabilities(
            ndims=frozenset({1, 2, 3}),
            dtypes=frozenset(dtypes),
            # channels_last is offered, not claimed by `torch`: torch 2.13's oneDNN path
            # gets some channels-last convolutions with one input channel wrong (module
            # docstring); `torch-channels-last` claims it, and its report shows the bug
            layouts=frozenset(layouts),
            # asymmetric and negative padding are emulated with F.pad (forward/backward)
            # and by cropping the output (transposed), as a user would.
            padding=frozenset({"symmetric", "asymmetric", "negative"}),
            passes=frozenset({"forward", "backward", "transposed"}),
            stride=True, dilation=True, groups=True, bias=True, zero_batch=True,
            output_padding=True, deterministic=True,
            error_model=ErrorModel(note="oneDNN direct or im2col+GEMM, summed in the case dtype"),
            error_models=tuple(models.items()),
        )

    # -- conversion ------------------------------------------------------------------
    def _tensor(self, a: np.ndarray):
        if not isinstance(a, np.ndarray):
            a = np.asarray(a)
        if a.dtype.name not in self._TORCH_DTYPES:
            raise TypeError(f"torch adapter: dtype {a.dtype} is not supported; expected one of "
                            f"{', '.join(self._TORCH_DTYPES)}")
        if not a.flags.writeable or any(s < 0 for s in a.strides):
            a = np.array(a)          # torch.from_numpy needs a writable, positive-stride array
        if a.dtype.name == "bfloat16":
            return self._torch.from_numpy(a.view(np.uint16)).view(self._torch.bfloat16)
        return self._torch.from_numpy(a)

    def _numpy(self, t) -> np.ndarray:
        t = t.detach()
        if t.dtype == self._torch.bfloat16:
            return np.ascontiguousarray(t.contiguous().view(self._torch.int16).numpy()).view(self._bf16)
        return np.ascontiguousarray(t.numpy())

    def _plan_for(self, x, stride, padding, dilation, groups, layout, transposed, output_padding=None):
        nd = x.ndim - 2
        size = x.shape[1:-1] if layout == "channels_last" else x.shape[2:]
        return _plan(nd, tuple(stride), tuple(tuple(p) for p in padding), tuple(dilation),
                     int(groups), layout, transposed,
                     tuple(output_padding) if output_padding is not None else None,
                     0 in size)

    # -- the graph ---------------------------------------------------------------------
    def _conv_graph(self, p, xt, wt, bt):
        if p.to_torch is not None:
            xt = xt.permute(p.to_torch)
            wt = wt.permute(p.to_torch)
        if p.pad is not None:
            xt = self._F.pad(xt, p.pad)
        y = self._conv[xt.ndim - 2](xt, wt, bt, p.stride, p.native_padding, p.dilation, p.groups)
        return y

    def _out(self, p, y):
        if p.from_torch is not None:
            y = y.permute(p.from_torch)
        return self._numpy(y)

    # -- the call signature ----------------------------------------------------------
    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        p = self._plan_for(x, stride, padding, dilation, groups, layout, False)
        bt = None if b is None else self._tensor(b)
        y = self._conv_graph(p, self._tensor(x), self._tensor(w), bt)
        return self._out(p, y)

    def backward(self, x, w, b, grad_y, *, stride, padding, dilation, groups,
                 layout="channels_first"):
        torch = self._torch
        p = self._plan_for(x, stride, padding, dilation, groups, layout, False)
        xt = self._tensor(x).requires_grad_(True)
        wt = self._tensor(w).requires_grad_(True)
        bt = None if b is None else self._tensor(b).requires_grad_(True)
        with torch.enable_grad():
            y = self._conv_graph(p, xt, wt, bt)
            gy = self._tensor(grad_y)
            if p.to_torch is not None:
                gy = gy.permute(p.to_torch)
            inputs = (xt, wt) if bt is None else (xt, wt, bt)
            grads = torch.autograd.grad(y, inputs, grad_outputs=gy, allow_unused=True)
        out = []
        for g, t in zip(grads, inputs):
            # allow_unused: an input no output depends on (empty batch) gets zeros
            out.append(self._numpy(torch.zeros_like(t) if g is None else g))
        if bt is None:
            out.append(None)
        return tuple(out)

    def transposed(self, x, w, b, *, stride, padding, dilation, groups, output_padding,
                   layout="channels_first"):
        p = self._plan_for(x, stride, padding, dilation, groups, layout, True, output_padding)
        xt, wt = self._tensor(x), self._tensor(w)
        bt = None if b is None else self._tensor(b)
        if p.to_torch is not None:
            xt = xt.permute(p.to_torch)
            wt = wt.permute(p.to_torch)
        y = self._conv_t[xt.ndim - 2](xt, wt, bt, p.stride, p.native_padding, p.output_padding,
                                      p.groups, p.dilation)
        if p.crop is not None:
            idx = (slice(None), slice(None)) + tuple(
                slice(lo, n - hi) for (lo, hi), n in zip(p.crop, y.shape[2:]))
            y = y[idx]
        return self._out(p, y)

    def backend(self, x, w, *, stride, padding, dilation, groups, transposed=False,
                output_padding=None, layout="channels_first") -> str:
        """The torch convolution backend torch selects for this call (a diagnostic)."""
        p = self._plan_for(x, stride, padding, dilation, groups, layout, transposed, output_padding)
        xt, wt = self._tensor(x), self._tensor(w)
        if p.to_torch is not None:
            xt, wt = xt.permute(p.to_torch), wt.permute(p.to_torch)
        if p.pad is not None:
            xt = self._F.pad(xt, p.pad)
        op = list(p.output_padding) if transposed else [0] * (xt.ndim - 2)
        return str(self._torch._C._select_conv_backend(
            xt, wt, None, list(p.stride), list(p.native_padding), list(p.dilation), transposed,
            op, p.groups)).rpartition(".")[2]


def _low_precision_models():
    """Error models of torch's CPU convolutions in bfloat16 and float16 (measured here).

    The convolution and its gradients accumulate in float32 (the products of two
    bfloat16 or float16 numbers are exact in float32) and round once to the output
    format (precision.probe and the reference invariants agree). The transposed
    convolution does not, on every path: some geometries round each tap's product to
    the output format, and some (3-D with dilation and output padding, N=4, seen in the
    nightly profile) sum the overlapping taps in the output format itself, tap after
    tap (bit for bit y = fl16(fl16(p_1 + p_2) + p_3 ...)). So the transposed pass is
    declared with products and accumulation in that format: γ_n at its u.
    """
    for dt in ("bfloat16", "float16"):
        yield dt, ErrorModel(product="float32", accumulate="float32",
                             note="float32 accumulation, one rounding to the output")
        yield f"{dt}/transposed", ErrorModel(product=dt, accumulate=dt,
                                             note="taps summed in the output format")


def _slow_path_backward_models(torch):
    """Error models of the float16 gradients where torch runs float16 on its own
    (Slow2d/Slow3d/SlowDilated*) kernels rather than oneDNN's.

    That happens on CPUs without oneDNN float16 support (no AVX512-FP16/AMX-FP16),
    such as the AVX2 machine of this project. There the forward is still correctly
    rounded, but the input and weight gradients are not (measured with torch 2.13.0:
    12-54% of grad_input and 25-36% of grad_weight elements differ from the
    correctly rounded float64 result, 1-3 D; script: scripts/probe_torch_fp16.py, and
    finding ``torch.float16_slow_gradients`` of scripts/library_findings.py; seen on AMD
    EPYC with AVX2 only and with AVX-512 (AVX512_BF16, no AVX512-FP16); the bias
    gradient too), so the three gradients are declared with accumulation in float16: γ_n at u=2^-11. Where
    torch picks oneDNN for float16, nothing is added and the float32 model stands.
    """
    try:
        x = torch.zeros(1, 1, 3, 3, dtype=torch.float16)
        w = torch.zeros(1, 1, 2, 2, dtype=torch.float16)
        backend = str(torch._C._select_conv_backend(x, w, None, [1, 1], [0, 0], [1, 1],
                                                    False, [0, 0], 1)).rpartition(".")[2]
    except (AttributeError, RuntimeError, TypeError):
        backend = "unknown"
    if backend.startswith("Mkldnn"):
        return
    note = f"float16 on torch's {backend} kernels: gradients summed in float16 (measured)"
    for pass_ in ("grad_input", "grad_weight", "grad_bias"):
        yield f"float16/{pass_}", ErrorModel(product="float16", accumulate="float16", note=note)


def _mkldnn_fp32_precision(torch) -> str:
    """The float32 math mode oneDNN convolutions run in: the first setting that is not
    "none" of torch.backends.mkldnn.conv, torch.backends.mkldnn, torch.backends."""
    for owner in ("mkldnn.conv", "mkldnn", ""):
        obj = torch.backends
        try:
            for part in filter(None, owner.split(".")):
                obj = getattr(obj, part)
            value = str(obj.fp32_precision)
        except AttributeError:
            continue
        if value != "none":
            return value
    return "none"


def torch_bf16():
    """``torch-bf16``: torch in bfloat16, 1-3 D, under the error model it follows.

    An earlier note said this build's bfloat16 conv3d misplaces outputs for a strided,
    padded case (x ones (3,1,1,2,4), padding (1,1),(0,1),(0,0), w ones (1,1,1,1,3),
    stride (1,1,2)). It is withdrawn: the case comes out exactly right on every machine
    tried (``python scripts/library_findings.py torch.bfloat16_conv3d``: AMD EPYC with
    AVX-512 and an AVX2 machine without it, torch 2.13.0+cpu, 1 and 2 threads, 300
    repetitions). Whatever this machine's torch does, the report says it.
    """
    return TorchAdapter(dtypes=("bfloat16",), name="torch-bf16")


def torch_channels_last():
    """``torch-channels-last``: torch with channels-last memory claimed (float32/float64).

    Its report shows the channels-last bug of the module docstring."""
    return TorchAdapter(dtypes=("float64", "float32"), layouts=("channels_first", "channels_last"),
                        name="torch-channels-last")
