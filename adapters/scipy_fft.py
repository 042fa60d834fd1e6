"""scipy.signal.correlate with ``method="fft"``: an FFT convolution control.

The same layer assembly as the ``scipy`` adapter (explicit padding, one correlation
per sample/output/input channel, stride by slicing, dilation by a zero-inserted
kernel), but every correlation goes through scipy's FFT path, which computes in the
dtype of the input (pocketfft has single- and double-precision transforms). Its
error is normwise, O(log n)·u of the operands' norms, not componentwise: declared
``ErrorModel(algorithm="fft")`` it is conformant; declared ``direct`` (the
``scipy-fft-declared-direct`` variant) it is flagged where small outputs sit next to
large ones.
"""
from __future__ import annotations

from convwitness.numerics.bounds import ErrorModel

from .scipy_signal import ScipyAdapter

__all__ = ["ScipyFftAdapter", "scipy_fft_declared_direct"]


class ScipyFftAdapter(ScipyAdapter):
    name = "scipy-fft"

    def __init__(self, declare: str = "fft"):
        super().__init__()
        import scipy.signal
        correlate = scipy.signal.correlate

        def fft_correlate(a, v, mode="valid", method=None):
            return correlate(a, v, mode=mode, method="fft")
        self._correlate = fft_correlate
        model = (ErrorModel(algorithm="fft", note="scipy.signal.correlate(method='fft')")
                 if declare == "fft" else ErrorModel(note="claims direct summation"))
        if declare != "fft":
            self.name = "scipy-fft-declared-direct"
        self.capabilities = self.capabilities.replace(error_model=model)


def scipy_fft_declared_direct():
    return ScipyFftAdapter(declare="direct")
