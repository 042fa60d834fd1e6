"""Per-pass claims and named constraints (geometry/claims.py), each against a real
library that needs it where one is installed here.

Sources: torch.nn.functional.conv_transpose1d and onnxruntime's ConvTranspose
themselves (which output paddings they accept); the ONNX operator spec allows
output_padding below max(stride, dilation) (recalled from memory); the rest is
convwitness's own claim contract, checked case by case.
"""
from __future__ import annotations

import itertools

import numpy as np
import pytest

from convwitness import Capabilities, ConvSpec, ErrorModel
from convwitness.errors import SpecError
from convwitness.invariants import get


def _transposed_1d_grid():
    for op, stride, dil in itertools.product(range(3), range(1, 4), range(1, 4)):
        try:
            yield ConvSpec(1, 1, 1, (5,), (3,), stride=(stride,), dilation=(dil,),
                           transposed=True, output_padding=(op,), bias=False)
        except SpecError:
            continue                     # outside the geometry space: op >= max(s, d)


def test_output_padding_below_stride_is_exactly_what_onnxruntime_accepts():
    ort = pytest.importorskip("onnxruntime", reason="onnxruntime is not installed")
    from onnx import TensorProto, helper
    caps = Capabilities(passes={"forward", "transposed"}, constraints=["output_padding<stride"])
    seen = {True: 0, False: 0}
    for spec in _transposed_1d_grid():
        x = np.ones((1, 1, 5), np.float32)
        w = np.ones((1, 1, 3), np.float32)
        node = helper.make_node("ConvTranspose", ["x", "w"], ["y"], strides=list(spec.stride),
                                dilations=list(spec.dilation), output_padding=list(spec.output_padding))
        graph = helper.make_graph([node], "g", [
            helper.make_tensor_value_info("x", TensorProto.FLOAT, x.shape),
            helper.make_tensor_value_info("w", TensorProto.FLOAT, w.shape)],
            [helper.make_tensor_value_info("y", TensorProto.FLOAT, None)])
        model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
        opts = ort.SessionOptions()
        opts.log_severity_level = 4
        try:
            sess = ort.InferenceSession(model.SerializeToString(), opts, providers=["CPUExecutionProvider"])
            sess.run(None, {"x": x, "w": w})
            accepted = True
        except Exception:
            accepted = False
        assert caps.admits(spec) == accepted, spec.describe()
        seen[accepted] += 1
    assert seen[True] and seen[False]            # the grid has both sides


def test_output_padding_below_max_stride_dilation_is_what_torch_accepts():
    torch = pytest.importorskip("torch", reason="torch is not installed")
    caps = Capabilities(passes={"forward", "transposed"},
                        constraints=["output_padding<max(stride,dilation)"])
    checked = 0
    for op, stride, dil in itertools.product(range(4), range(1, 4), range(1, 4)):
        try:
            torch.nn.functional.conv_transpose1d(torch.ones(1, 1, 5), torch.ones(1, 1, 3),
                                                 stride=stride, dilation=dil, output_padding=op)
            accepted = True
        except RuntimeError:
            accepted = False
        try:
            spec = ConvSpec(1, 1, 1, (5,), (3,), stride=(stride,), dilation=(dil,), transposed=True,
                            output_padding=(op,), bias=False)
        except SpecError:
            assert not accepted                     # the geometry space itself ends there
            continue
        assert caps.admits(spec) == accepted
        checked += 1
    assert checked


def test_stride_with_dilation_and_depthwise_only_constraints():
    caps = Capabilities(constraints=["no_stride_with_dilation", "groups_single_or_depthwise"])
    assert caps.admits(ConvSpec(1, 4, 4, (9,), (3,), stride=(2,)))
    assert caps.admits(ConvSpec(1, 4, 4, (9,), (3,), dilation=(2,)))
    why = caps.refusal(ConvSpec(1, 4, 4, (9,), (3,), stride=(2,), dilation=(2,)))
    assert why and "no_stride_with_dilation" in why
    assert caps.admits(ConvSpec(1, 4, 8, (9,), (3,), groups=4))
    assert not caps.admits(ConvSpec(1, 4, 4, (9,), (3,), groups=2))
    with pytest.raises(SpecError, match="unknown constraint"):
        Capabilities(constraints=["stride<kernel"])


def test_per_pass_groups_and_zero_batch_judge_each_invariant_on_its_passes():
    caps = Capabilities(passes={"forward", "backward", "transposed"},
                        per_pass={"transposed": {"groups": False},
                                  "backward": {"zero_batch": False, "dtypes": {"float64"}}})
    grouped_t = ConvSpec(1, 4, 4, (5,), (3,), groups=2, transposed=True)
    assert not caps.admits(grouped_t) and "transposed pass" in caps.refusal(grouped_t)
    assert caps.admits(ConvSpec(1, 4, 4, (5,), (3,), groups=2))
    empty = ConvSpec(0, 2, 2, (5,), (3,))
    assert caps.admits(empty)                                  # forward claims zero batch
    grad = get("grad_input.reference").claims(caps)
    assert not grad.admits(empty) and grad.dtypes == frozenset({"float64"})
    assert get("forward.reference").claims(caps).admits(empty)
    # the claims cross the worker and wire boundaries as plain data
    assert Capabilities.from_dict(caps.to_dict()) == caps
    with pytest.raises(SpecError, match="per_pass key"):
        Capabilities(per_pass={"grad_input": {"groups": False}})
    with pytest.raises(SpecError, match="field 'kernel'"):
        Capabilities(per_pass={"forward": {"kernel": False}})


def test_error_models_by_ndim_most_specific_first():
    m3, m3t, base = ErrorModel(accumulate="float64"), ErrorModel(block=16), ErrorModel()
    caps = Capabilities(error_models={"float32/3d": m3, "float32/forward/3d": m3t})
    assert caps.error_model_for("float32", "forward", 3) is m3t
    assert caps.error_model_for("float32", "grad_input", 3) is m3
    assert caps.error_model_for("float32", "forward", 2) == base
    with pytest.raises(SpecError, match="/3d"):
        Capabilities(error_models={"float32/4d": m3})


def test_onnxruntime_adapter_claims_output_padding_below_stride():
    pytest.importorskip("onnxruntime", reason="onnxruntime is not installed")
    from convwitness import load_adapter
    caps = load_adapter("onnxruntime").capabilities
    assert caps.output_padding and "output_padding<stride" in caps.constraints
