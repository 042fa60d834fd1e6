"""Built-in adapters, one module per implementation family.

``BUILTINS`` maps a name (what ``--adapter NAME`` accepts) to ``module:factory``.
Modules are imported only when their adapter is loaded, so a missing library makes
that adapter ``unavailable`` instead of breaking ``import convwitness``.
"""
from __future__ import annotations

BUILTINS: dict[str, str] = {
    "reference": "convwitness.adapters.reference:ReferenceAdapter",
    "torch": "convwitness.adapters.torch_nn:TorchAdapter",
    "torch-bf16": "convwitness.adapters.torch_nn:torch_bf16",
    "torch-channels-last": "convwitness.adapters.torch_nn:torch_channels_last",
    "jax": "convwitness.adapters.jax_lax:JaxAdapter",
    "jax-bf16": "convwitness.adapters.jax_lax:jax_bf16",
    "onnxruntime": "convwitness.adapters.onnxruntime_node:OnnxRuntimeAdapter",
    "onnx-reference": "convwitness.adapters.onnx_reference:OnnxReferenceAdapter",
    "tensorflow": "convwitness.adapters.tensorflow_nn:TensorflowAdapter",
    "scipy": "convwitness.adapters.scipy_signal:ScipyAdapter",
    "scipy-fft": "convwitness.adapters.scipy_fft:ScipyFftAdapter",
    "oxtervane-npu": "convwitness.adapters.oxtervane:OxtervaneNPU",
    "winograd-f2": "convwitness.adapters.winograd:WinogradF2",
    "winograd-f4": "convwitness.adapters.winograd:WinogradF4",
    "quant-numpy": "convwitness.adapters.quant_numpy:QuantNumpy",
    "quant-numpy-fixed": "convwitness.adapters.quant_numpy:quant_numpy_fixed",
    "quant-numpy-f32": "convwitness.adapters.quant_numpy:quant_numpy_f32",
    "oxtervane-int8": "convwitness.adapters.oxtervane_int8:OxtervaneInt8",
    "oxtervane-int8-padbug": "convwitness.adapters.oxtervane_int8:OxtervaneInt8PadBug",
    "torch-quant": "convwitness.adapters.torch_quant:TorchQuant",
    "torch-quant-transposed": "convwitness.adapters.torch_quant:TorchQuantTransposed",
    "torch-quant-transposed-fbgemm": "convwitness.adapters.torch_quant:transposed_fbgemm",
    "onnxruntime-quant": "convwitness.adapters.onnxruntime_quant:QuantOnnxRuntime",
    "onnxruntime-convinteger": "convwitness.adapters.onnxruntime_quant:conv_integer",
    "onnxruntime-qlinearconv": "convwitness.adapters.onnxruntime_quant:qlinear_conv",
    "onnxruntime-qlinearconv-exact": "convwitness.adapters.onnxruntime_quant:qlinear_conv_exact",
}

__all__ = ["BUILTINS"]
