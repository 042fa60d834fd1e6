"""scipy behind the call signature: ``scipy.signal.correlate``, forward only.

The convolution layer assembled from plain N-D cross-correlations, as a user of
scipy.signal would:

* the input is padded explicitly with zeros (``np.pad``; negative padding crops it);
* for every (sample n, output channel o, input channel c of o's group) one
  ``scipy.signal.correlate(x_p[n, c], w_d[o, c'], mode="valid", method="direct")``
  is computed and the ``C_in/G`` results of a group are summed in input-channel
  order, then the bias is added;
* stride: the stride-1 result is sliced ``[::s]`` on each axis;
* dilation: the kernel is zero-inserted (``w_d[::d] = w``, size ``d(k-1)+1``), so
  the inserted zeros join the sums as exact ``0 * x`` terms -- and as ``0 * inf = NaN``
  when the input holds infinities or NaN (``ieee_special`` is not claimed).

Error model: direct summation in the dtype of the case. For float32 input scipy
accumulates in float32 (its N-D correlation loops in the input type, and the 1-D
case goes to ``numpy.correlate``, a float32 dot product); the adapter's sums over
input channels are float32 as well. Channels first only (scipy has no layout).
"""
from __future__ import annotations

import numpy as np

from convwitness.numerics.bounds import ErrorModel
from convwitness.geometry.capabilities import Capabilities
from convwitness.errors import AdapterUnavailable

__all__ = ["ScipyAdapter"]


class ScipyAdapter:
    """scipy.signal.correlate per (sample, out-channel, in-channel) pair."""

    name = "scipy"

    def __init__(self):
        try:
            import scipy
            import scipy.signal
        except ImportError:
            raise AdapterUnavailable(
                "scipy is not installed; fix: pip install 'convwitness[scipy]'") from None
        self._correlate = scipy.signal.correlate
        self.version = scipy.__version__
        self.capabilities = Capabilities(
            ndims=frozenset({1, 2, 3}),
            dtypes=frozenset({"float32", "float64"}),
            layouts=frozenset({"channels_first"}),
            padding=frozenset({"symmetric", "asymmetric", "negative"}),
            passes=frozenset({"forward"}),
            stride=True, dilation=True, groups=True, bias=True, zero_batch=True,
            output_padding=False, deterministic=True,
            error_model=ErrorModel(note="direct correlation loops, summed in the case dtype"),
        )

    def forward(self, x, w, b, *, stride, padding, dilation, groups, layout="channels_first"):
        if layout != "channels_first":
            raise ValueError(f"scipy adapter: layout={layout!r}, expected 'channels_first'; "
                             "scipy.signal has no channel axis, transpose the arrays first")
        x = np.asarray(x)
        w = np.asarray(w)
        nd = x.ndim - 2
        # explicit padding: positive amounts add zeros, negative ones crop
        pad = [(0, 0), (0, 0)] + [(max(lo, 0), max(hi, 0)) for lo, hi in padding]
        xp = np.pad(x, pad)
        crop = (slice(None), slice(None)) + tuple(
            slice(max(-lo, 0), n - max(-hi, 0)) for (lo, hi), n in zip(padding, xp.shape[2:]))
        xp = xp[crop]
        # dilation: zero-insert the kernel
        c_out, cg = w.shape[0], w.shape[1]
        ks = w.shape[2:]
        eff = tuple(d * (k - 1) + 1 for k, d in zip(ks, dilation))
        wd = np.zeros((c_out, cg) + eff, dtype=w.dtype)
        wd[(slice(None), slice(None)) + tuple(slice(None, None, d) for d in dilation)] = w
        out_size = tuple((n - e) // s + 1 for n, e, s in zip(xp.shape[2:], eff, stride))
        y = np.zeros((x.shape[0], c_out) + out_size, dtype=x.dtype)
        og = c_out // groups
        step = tuple(slice(None, None, s) for s in stride)
        for n in range(x.shape[0]):
            for o in range(c_out):
                g = o // og
                acc = None
                for c in range(cg):
                    r = self._correlate(xp[n, g * cg + c], wd[o, c], mode="valid", method="direct")
                    acc = r if acc is None else acc + r
                if acc is not None:
                    y[n, o] = acc[step]
        if b is not None:
            y += np.asarray(b, dtype=x.dtype).reshape((-1,) + (1,) * nd)
        return y
