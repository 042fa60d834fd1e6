"""The quantized integer convolution: spec, exact reference, requantization models,
strategies, invariants, zoo and real kernels.

Outside judges, named beside each check:
- torch.nn.functional.conv{1,2,3}d in float64 (a general-purpose library) for the exact
  integer accumulation, padding at the zero point included;
- the ONNX QuantizeLinear operator page (https://onnx.ai/onnx/operators/onnx__QuantizeLinear:
  "For (x / y_scale), it rounds to the nearest even", then the zero point, then saturation)
  and the ONNX reference evaluator's QLinearConv (onnx.reference, a general-purpose library);
- IEEE 754-2019 roundTiesToEven, which numpy's np.rint implements;
- Jacob et al. 2018, CVPR, "Quantization and Training of Neural Networks for Efficient
  Integer-Arithmetic-Only Inference", Sec. 2.2 (M = 2^-n M0 with M0 in [0.5, 1)); the
  gemmlowp rounding helpers' values are recalled from memory and marked so.
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from convwitness.adapters.quant_numpy import QuantNumpy
from convwitness.adapters.zoo_quant import QUANT_CORRECT, QUANT_ZOO
from convwitness.boundary.loading import load_adapter
from convwitness.errors import SpecError
from convwitness.geometry.capabilities import Capabilities
from convwitness.geometry.quant import QuantCapabilities, QuantSpec, worst_sum
from convwitness.geometry.spec import ConvSpec
from convwitness.invariants import catalogue
from convwitness.numerics import requant as rq
from convwitness.run.certify import certify


def _spec(nd=2, pad=((1, 2), (0, 1), (1, 1)), groups=2, cin=4, cout=6, **q):
    conv = ConvSpec(batch=2, in_channels=cin, out_channels=cout, input_size=(5, 4, 3)[:nd],
                    kernel_size=(3, 2, 2)[:nd], padding=pad[:nd], stride=(2, 1, 1)[:nd],
                    dilation=(1, 2, 1)[:nd], groups=groups, bias=q.get("bias", "none") != "none",
                    dtype="float64")
    return QuantSpec(conv, **q)


def _arrays(spec, seed=0):
    rng = np.random.default_rng(seed)
    lo, hi = (0, 255) if spec.x_dtype == "uint8" else (-128, 127)
    x = rng.integers(lo, hi + 1, spec.x_shape).astype(spec.x_dtype)
    w = rng.integers(-128, 128, spec.w_shape).astype(np.int8)
    return x, w


# -- spec and claims ----------------------------------------------------------------------
def test_spec_errors_are_one_line_and_say_what_was_expected():
    with pytest.raises(SpecError) as e:
        _spec(x_dtype="uint8", x_zero_point=-1)
    assert "x_zero_point=-1 must be an int in [0, 255]" in str(e.value) and "\n" not in str(e.value)
    with pytest.raises(SpecError) as e:
        _spec(w_scale=(1.0, 2.0))
    assert "expected 1 (per tensor) or C_out=6" in str(e.value)
    with pytest.raises(SpecError):
        _spec(output="int8")            # requantized output needs y_scale


def test_capabilities_carry_the_quantized_claim_through_their_dict_form():
    # the isolation worker's hello sends Capabilities.to_dict(): the claim must survive it
    caps = Capabilities(passes={"quantized"}, quant=QuantCapabilities(model="fixed_point", max_sum=2 ** 20))
    back = Capabilities.from_dict(caps.to_dict())
    assert back.quant == caps.quant and back.passes == frozenset({"quantized"})
    spec = _spec(x_dtype="uint8", x_zero_point=0)
    # worst sum = C_in/G * prod(k) * max|x - x_zp| * max|w - w_zp| (common practice, no
    # source): 2 * (3*2) terms, uint8 with zp 0 reaches 255, int8 with zp 0 reaches -128
    assert worst_sum(spec) == 2 * 6 * 255 * 128
    assert "exceeds max_sum" in QuantCapabilities(max_sum=1000).refusal(spec)


# -- the exact reference against torch ----------------------------------------------------


@pytest.mark.parametrize("nd", [1, 2, 3])
@pytest.mark.parametrize("x_dtype,x_zp", [("uint8", 200), ("int8", -100)])
def test_accumulation_equals_torch_float64_conv_of_the_differences(nd, x_dtype, x_zp):
    torch = pytest.importorskip("torch")
    # outside judge: torch.nn.functional.conv{nd}d in float64 on (x - x_zp) and
    # (w - w_zp[o]), the input padded with 0 in real terms (F.pad) -- integers far below
    # 2^53, so float64 is exact (IEEE 754)
    spec = _spec(nd=nd, x_dtype=x_dtype, x_zero_point=x_zp, w_zero_point=(3, -2, 0, 7, -128, 127))
    x, w = _arrays(spec)
    acc = rq.accumulate(spec, x, w)
    xd = torch.tensor(x.astype(np.float64) - x_zp)
    pads = [p for lo_hi in reversed(spec.conv.padding) for p in lo_hi]
    xd = torch.nn.functional.pad(xd, pads)
    wd = torch.tensor(w.astype(np.float64) - np.asarray(spec.w_zero_point).reshape((-1,) + (1,) * (nd + 1)))
    conv = getattr(torch.nn.functional, f"conv{nd}d")
    want = conv(xd, wd, stride=spec.conv.stride, dilation=spec.conv.dilation, groups=spec.conv.groups)
    assert np.array_equal(acc, want.numpy().astype(np.int64))
    # and the numpy control computes the same integers by its own route
    ctrl = QuantNumpy().accumulate(x, w, None, stride=spec.conv.stride, padding=spec.conv.padding,
                                   dilation=spec.conv.dilation, groups=spec.conv.groups, x_scale=1.0,
                                   x_zero_point=x_zp, w_scale=(1.0,), w_zero_point=spec.w_zero_point)
    assert np.array_equal(acc, ctrl)


# -- requantization: the ONNX rule and the models -----------------------------------------
def test_exact_requantization_rounds_ties_to_even_then_adds_the_zero_point():
    # ONNX QuantizeLinear: round(x / y_scale) to nearest even, + y_zero_point, saturate.
    # With power-of-two scales acc*M is exact in float64, so np.rint (IEEE 754
    # roundTiesToEven) is an outside judge of the tie rule.
    spec = _spec(nd=1, groups=1, cin=1, cout=1, pad=((0, 0),), x_dtype="int8", output="int8",
                 y_scale=4.0, y_zero_point=3)
    acc = np.arange(-600, 601, dtype=np.int64).reshape(1, 1, -1)
    got = rq.requantize_exact(spec, acc)
    want = np.clip(np.rint(acc / 4.0) + 3, -128, 127)
    assert np.array_equal(got, want)
    # ties are there: 2/4 = 0.5 -> 0, 6/4 = 1.5 -> 2, -2/4 -> -0 (half to even)
    assert got[0, 0, 602] == 3 and got[0, 0, 606] == 5 and got[0, 0, 598] == 3


def _onnx_reference_qlinearconv(spec, x, w, b):
    pytest.importorskip("onnx")
    from onnx import TensorProto, helper
    from onnx.reference import ReferenceEvaluator
    el = {"uint8": TensorProto.UINT8, "int8": TensorProto.INT8}
    c = spec.conv
    node = helper.make_node("QLinearConv", ["x", "xs", "xz", "w", "ws", "wz", "ys", "yz"] + (["b"] if b is not None else []),
                            ["y"], strides=list(c.stride), dilations=list(c.dilation), group=c.groups,
                            pads=[p[0] for p in c.padding] + [p[1] for p in c.padding])
    ins = [helper.make_tensor_value_info(n, t, None) for n, t in
           (("x", el[spec.x_dtype]), ("xs", TensorProto.FLOAT), ("xz", el[spec.x_dtype]), ("w", TensorProto.INT8),
            ("ws", TensorProto.FLOAT), ("wz", TensorProto.INT8), ("ys", TensorProto.FLOAT), ("yz", el[spec.output]))]
    if b is not None:
        ins.append(helper.make_tensor_value_info("b", TensorProto.INT32, None))
    g = helper.make_graph([node], "g", ins, [helper.make_tensor_value_info("y", el[spec.output], None)])
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 22)])
    feeds = {"x": x, "xs": np.float32(spec.x_scale), "xz": np.array(spec.x_zero_point, spec.x_dtype), "w": w,
             "ws": np.asarray(spec.w_scale, np.float32) if spec.per_channel else np.float32(spec.w_scale[0]),
             "wz": np.asarray(spec.w_zero_point, np.int8) if spec.per_channel else np.int8(spec.w_zero_point[0]),
             "ys": np.float32(spec.y_scale), "yz": np.array(spec.y_zero_point, spec.output)}
    if b is not None:
        feeds["b"] = b
    return ReferenceEvaluator(m).run(None, feeds)[0]


@pytest.mark.parametrize("seed", range(4))
def test_exact_reference_agrees_with_the_onnx_reference_evaluator_for_even_zero_points(seed):
    # outside judge: onnx.reference's QLinearConv (onnx 1.23.2). Power-of-two scales
    # (its float32 multiplier is then exact) and an even y_zero_point: its rounding after
    # adding the zero point coincides with QuantizeLinear's round-then-add.
    spec = _spec(nd=2, groups=1, cin=3, cout=2, pad=((1, 1), (1, 1)), x_dtype="uint8", x_zero_point=131,
                 x_scale=2.0 ** -3, w_scale=(2.0 ** -4, 2.0 ** -6), w_zero_point=(0, 0), bias="int32",
                 output="uint8", y_scale=2.0 ** -1, y_zero_point=100)
    x, w = _arrays(spec, seed)
    b = np.random.default_rng(seed).integers(-500, 500, 2).astype(np.int32)
    y, _ = rq.reference(spec, x, w, b)
    assert np.array_equal(y, _onnx_reference_qlinearconv(spec, x, w, b).astype(np.int64))


def test_the_onnx_reference_evaluator_rounds_after_adding_an_odd_zero_point():
    # A difference we document, not hide (docs/quantized.md): onnx.reference's QLinearConv
    # computes np.round(acc*M + y_zp); QuantizeLinear's formula is round(acc*M) + y_zp.
    # At a tie with an odd zero point they differ by one unit: acc = 3, M = 1/2, zp = 1
    # gives 2 (theirs) and 3 (QuantizeLinear's, ours). Seen with onnx 1.23.2, numpy 2.4.6,
    # Python 3.11: python3 -m pytest tests/test_quantized.py -k odd_zero_point
    conv = ConvSpec(batch=1, in_channels=1, out_channels=1, input_size=(1,), kernel_size=(1,), bias=False,
                    dtype="float64")
    spec = QuantSpec(conv, x_dtype="uint8", output="uint8", y_scale=2.0, y_zero_point=1)
    x, w = np.array([[[3]]], np.uint8), np.array([[[1]]], np.int8)
    assert int(rq.reference(spec, x, w)[0].ravel()[0]) == 3
    assert int(_onnx_reference_qlinearconv(spec, x, w, None).ravel()[0]) == 2


def test_fixed_point_multiplier_follows_jacob_2018():
    # Jacob et al. 2018, Sec. 2.2: M = 2^-n M0, M0 in [0.5, 1), held as a Q31 int32;
    # the Q31 rounding error of M0 is at most 2^-32, so relative to M at most 2^-31.
    rng = np.random.default_rng(0)
    for m in list(rng.uniform(1e-6, 0.99, 200)) + [2.0 ** -20, 0.5, 0.75, 1.5]:
        m0, n = rq.quantize_multiplier(float(m))
        assert 2 ** 30 <= m0 < 2 ** 31
        assert abs(m0 * 2.0 ** (-31 - n) - m) <= m * 2.0 ** -31
    # gemmlowp's helpers, values recalled from memory: SaturatingRoundingDoublingHighMul
    # of 2^30 and 2^30 is 2^29 (0.5 * 0.5 = 0.25 in Q31); RoundingDivideByPOT rounds half
    # away from zero: 5 >> 1 -> 3, -5 >> 1 -> -3
    assert rq._srdhm(np.array([2 ** 30]), 2 ** 30)[0] == 2 ** 29
    assert list(rq._rounding_shift(np.array([5, -5, 4, -4]), 1)) == [3, -3, 2, -2]


@pytest.mark.parametrize("model", ["fixed_point", "float32"])
def test_each_models_implementation_stays_within_its_derived_deviation(model):
    # the derived bound is sound for an implementation of the model: the fixed-point
    # requantization of Jacob et al. 2018 and the float32 one of the numpy control,
    # against the exact rounding, on random multipliers from 2^-20 to 2
    rng = np.random.default_rng(1)
    ctrl = QuantNumpy(model)
    worst = 0.0
    for i in range(60):
        ys = float(np.float32(2.0 ** rng.uniform(-4, 18)))
        spec = _spec(nd=1, groups=1, cin=2, cout=3, pad=((1, 0),), x_dtype="uint8", x_zero_point=int(rng.integers(0, 256)),
                     x_scale=float(np.float32(rng.uniform(0.01, 1))), w_scale=tuple(float(np.float32(v)) for v in rng.uniform(0.01, 1, 3)),
                     output="int8", y_scale=ys, y_zero_point=int(rng.integers(-128, 128)))
        acc = rng.integers(-2 ** 24, 2 ** 24, (2, 3, 40))
        exact = rq.requantize_exact(spec, acc)
        got = (rq.fixed_point_requantize(spec, acc) if model == "fixed_point" else
               ctrl.requantize(acc, x_scale=spec.x_scale, w_scale=spec.w_scale, y_scale=ys,
                               y_zero_point=spec.y_zero_point, output="int8", clamp=None).astype(np.int64))
        dev, why = rq.deviation(spec, acc, model)
        assert np.all(np.abs(got - exact) <= dev), why
        worst = max(worst, float(np.abs(got - exact).max()))
    assert worst <= 1


# -- the suite on the zoo, the controls and the real kernels ------------------------------
def _flagged(adapter, seed):
    _, res = certify(load_adapter(adapter), profile="quick", seed=seed, report_dir=None, shrink=False,
                     only="quantized.*")
    return {r.id for r in res if r.verdict in ("fail", "error", "crash", "timeout", "internal")}


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_quantized_zoo_is_caught_and_the_controls_are_clean(seed):
    # every planted integer bug (adapters/zoo_quant.py, Q01-Q06) is caught in the quick
    # profile on this seed; the three controls (exact, fixed-point, float32 models) are not
    caught = set()
    for name, make in QUANT_CORRECT.items():
        assert not _flagged(make(), seed), name
    for name, cls in QUANT_ZOO.items():
        got = _flagged(cls(), seed)
        assert got, f"{name} certified although it carries a planted bug (seed {seed})"
        caught |= got
    quantized = {inv.id for inv in catalogue() if inv.id.startswith("quantized.")}
    if seed == 0:
        # every quantized invariant is proven by a bug it catches
        assert quantized <= caught, sorted(quantized - caught)


def test_quantized_witness_replays_from_its_files(tmp_path):
    from convwitness.cases.case import load_case
    from convwitness.cases.quant import QCase
    spec = _spec(nd=1, groups=1, cin=2, cout=2, pad=((1, 0),), bias="int32", output="uint8", y_scale=0.5,
                 y_zero_point=7, clamp=(7, 200))
    x, w = _arrays(spec)
    case = QCase(spec, x, w, np.array([5, -9], np.int32), "uniform", seed=3)
    case.save(str(tmp_path / "wit"), invariant="quantized.requantization")
    back, meta = load_case(str(tmp_path / "wit.json"))
    assert back.spec == spec and np.array_equal(back.x, x) and np.array_equal(back.b, case.b)


def test_quantized_pass_through_process_isolation():
    from convwitness.boundary.isolation.client import load_isolated
    spec = _spec(nd=2, x_dtype="int8", x_zero_point=-5, w_scale=tuple(0.01 * (i + 1) for i in range(6)),
                 w_zero_point=(0,), output="int8", y_scale=0.5, y_zero_point=-3)
    x, w = _arrays(spec)
    iso = load_isolated("quant-numpy")
    try:
        assert iso.capabilities.passes == frozenset({"quantized"}) and iso.capabilities.quant is not None
        y = iso.quantized(spec, x, w)
    finally:
        iso.close()
    assert np.array_equal(y.astype(np.int64), rq.reference(spec, x, w)[0])


def test_onnxruntime_kernels_certified_under_their_declared_claims():
    # onnxruntime 1.32.0 CPU: ConvInteger (per-tensor weight zero point) and QLinearConv
    # (float32 model) are conformant; QLinearConv claimed under the exact model is not
    # (a near-tie rounded by its float32 multiplier). Reproduce:
    # convwitness run --adapter onnxruntime-qlinearconv-exact --profile quick --report /tmp/x
    pytest.importorskip("onnxruntime")
    from convwitness.adapters.onnxruntime_quant import conv_integer, qlinear_conv, qlinear_conv_exact
    assert not _flagged(conv_integer(), 0)
    assert not _flagged(qlinear_conv(), 0)
    assert "quantized.requantization" in _flagged(qlinear_conv_exact(), 0)


def test_torch_quantized_conv_certified_under_the_float32_model():
    pytest.importorskip("torch")
    # torch 2.13.0+cpu, engine x86: conformant under the float32 model; claimed exact, the
    # suite finds ties off by one unit (scripts/probe_quant.py, case 3)
    from convwitness.adapters.torch_quant import TorchQuant
    assert not _flagged(TorchQuant(), 0)
    assert "quantized.requantization" in _flagged(TorchQuant(model="exact"), 0)


def test_demo_int8_port_and_its_planted_sibling():
    # the invented Oxtervane OXT-16 int8 port (fixed-point model) is conformant; its
    # sibling pads with a raw 0 and is caught where padding meets a nonzero zero point
    from convwitness.adapters.oxtervane_int8 import OxtervaneInt8, OxtervaneInt8PadBug
    assert not _flagged(OxtervaneInt8(), 0)
    assert "quantized.padding_zero" in _flagged(OxtervaneInt8PadBug(), 0)


@pytest.mark.parametrize("name,module,hint", [
    ("onnxruntime-qlinearconv", "onnxruntime", "pip install 'convwitness[onnx]'"),
    ("torch-quant", "torch", "pip install 'convwitness[torch]'"),
])
def test_missing_library_makes_the_quantized_adapter_unavailable(name, module, hint):
    # one line, what is missing and how to fix it (the house rule for user-facing errors)
    import subprocess
    import sys
    code = (f"import sys; sys.modules[{module!r}] = None\n"
            "import convwitness\n"
            f"try:\n    convwitness.load_adapter({name!r})\n"
            "except convwitness.AdapterUnavailable as exc:\n    print('UNAVAILABLE:', exc)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    line = out.stdout.strip()
    assert line.startswith("UNAVAILABLE:") and hint in line and "\n" not in line, (line, out.stderr)


def test_failing_quantized_case_goes_through_the_standard_profile_without_internal_error():
    """The standard profile's extra passes (1-minimal local pass, further causes, known
    causes) meet a quantized witness: the demo port's planted padding bug (raw 0 for the
    input zero point) fails, and convwitness itself raises nothing (no "internal")."""
    from convwitness import load_adapter
    from convwitness.run.certify import certify
    doc, results = certify(load_adapter("oxtervane-int8-padbug"), profile="standard",
                           only="quantized.*", seed=0)
    verdicts = {r.id: r.verdict for r in results}
    assert "internal" not in verdicts.values(), {r.id: r.message for r in results}
    assert verdicts["quantized.padding_zero"] == "fail"


# -- channels last ------------------------------------------------------------------------
def _last(a):
    return np.ascontiguousarray(np.moveaxis(a, 1, -1))


@pytest.mark.parametrize("nd", [1, 2, 3])
def test_channels_last_reference_is_the_channels_first_one_with_the_channel_axis_moved(nd):
    torch = pytest.importorskip("torch")
    # outside judge: torch.nn.functional.conv{nd}d in float64 on the channels-first
    # differences (exact: integers far below 2^53); a channels-last x is (N, *S, C_in),
    # w (C_out, *K, C_in/G), y (N, *S_out, C_out) (the float path's convention)
    q = dict(x_dtype="int8", x_zero_point=-100, w_zero_point=(3, -2, 0, 7, -128, 127), bias="int32")
    first = _spec(nd=nd, **q)
    last = QuantSpec(first.conv.replace(layout="channels_last"), **q)
    assert last.x_shape == _last(np.empty(first.x_shape)).shape
    x, w = _arrays(first)
    b = np.arange(-3, 3, dtype=np.int32) * 1000
    got = rq.accumulate(last, _last(x), _last(w), b)
    xd = torch.nn.functional.pad(torch.tensor(x.astype(np.float64) + 100),
                                 [p for lo_hi in reversed(first.conv.padding) for p in lo_hi])
    wd = torch.tensor(w.astype(np.float64) - np.asarray(first.w_zero_point).reshape((-1,) + (1,) * (nd + 1)))
    want = getattr(torch.nn.functional, f"conv{nd}d")(xd, wd, torch.tensor(b.astype(np.float64)),
                                                      stride=first.conv.stride, dilation=first.conv.dilation,
                                                      groups=first.conv.groups)
    assert np.array_equal(got, _last(want.numpy().astype(np.int64)))
    # requantized per channel: each output channel keeps its own multiplier in either layout
    rq_kw = dict(q, w_scale=tuple(0.01 * (i + 1) for i in range(6)), output="int8", y_scale=0.75,
                 y_zero_point=5, clamp=(-100, 120))
    first, last = _spec(nd=nd, **rq_kw), QuantSpec(last.conv, **rq_kw)
    y_first, acc_first = rq.reference(first, x, w, b)
    y_last, acc_last = rq.reference(last, _last(x), _last(w), b)
    assert np.array_equal(y_last, _last(y_first)) and np.array_equal(acc_last, _last(acc_first))
    for model in ("fixed_point", "float32"):
        assert np.array_equal(rq.deviation(last, acc_last, model)[0], _last(rq.deviation(first, acc_first, model)[0]))
    assert np.array_equal(rq.fixed_point_requantize(last, acc_last), _last(rq.fixed_point_requantize(first, acc_first)))
    real_last, _ = rq.dequantized_reference(last, _last(x), _last(w), b)
    assert np.allclose(real_last, _last(rq.dequantized_reference(first, x, w, b)[0]), rtol=1e-12, atol=1e-9)


def test_channels_last_is_claimed_explicitly():
    spec = QuantSpec(_spec().conv.replace(layout="channels_last"))
    assert "layout=channels_last not in layouts=['channels_first']" in QuantCapabilities().refusal(spec)
    both = QuantCapabilities(layouts=("channels_first", "channels_last"))
    assert both.admits(spec) and QuantCapabilities.from_dict(both.to_dict()) == both
    with pytest.raises(SpecError, match="layouts=.*unknown entries"):
        QuantCapabilities(layouts={"nhwc"})


def test_the_channels_last_layout_bug_is_caught_only_where_channels_last_is_claimed():
    # Q07 reads the channels-last weights in the wrong order; its channels-first path is
    # the correct control's, so a channels-first-only claim certifies it
    bug = QUANT_ZOO["q_channels_last_weights_reshaped"]()
    assert _flagged(bug, 0)
    first_only = QUANT_ZOO["q_channels_last_weights_reshaped"]()
    caps = first_only.capabilities
    first_only.capabilities = caps.replace(quant=dataclasses.replace(caps.quant, layouts={"channels_first"}))
    assert not _flagged(first_only, 0)


def test_torch_quantized_conv_certified_in_channels_last_too():
    pytest.importorskip("torch")
    # torch 2.13.0+cpu takes channels_last quantized tensors (adapters/torch_quant.py); the
    # quick run's examples cover both layouts and none fails
    from convwitness.adapters.torch_quant import TorchQuant
    doc, res = certify(load_adapter("torch-quant"), profile="quick", seed=0, report_dir=None,
                       only="quantized.*")
    assert doc["verdict"]["scope"]["layouts"] == ["channels_first", "channels_last"]
    assert {r.verdict for r in res} <= {"pass", "not-applicable"}
    assert TorchQuant().capabilities.quant.layouts == {"channels_first", "channels_last"}


# -- transposed ---------------------------------------------------------------------------
@pytest.mark.parametrize("nd", [1, 2, 3])
@pytest.mark.parametrize("layout", ["channels_first", "channels_last"])
def test_transposed_reference_equals_torch_float64_conv_transpose_of_the_differences(nd, layout):
    torch = pytest.importorskip("torch")
    # outside judge: torch.nn.functional.conv_transpose{nd}d in float64 on (x - x_zp) and
    # (w - w_zp[o]) (integers far below 2^53: exact). Per output channel o = g*C_out/G + j,
    # its parameters act on w[c, j] for the input channels c of group g (w is
    # (C_in, C_out/G, *K), torch's and ONNX ConvTranspose's weight layout)
    zps = (3, -2, 0, 7, -128, 127)
    conv = ConvSpec(batch=2, in_channels=4, out_channels=6, input_size=(4, 3, 2)[:nd],
                    kernel_size=(3, 2, 2)[:nd], stride=(2, 3, 1)[:nd], padding=((1, 1), (0, 0), (1, 1))[:nd],
                    dilation=(1, 2, 1)[:nd], output_padding=(1, 1, 0)[:nd], groups=2, transposed=True,
                    bias=True, dtype="float64", layout=layout)
    spec = QuantSpec(conv, x_dtype="uint8", x_zero_point=200, w_zero_point=zps, bias="int32")
    rng = np.random.default_rng(3)
    cf = (2, 4) + conv.input_size
    x = rng.integers(0, 256, cf).astype(np.uint8)
    w = rng.integers(-128, 128, (4, 3) + conv.kernel_size).astype(np.int8)
    b = np.arange(6, dtype=np.int32) * 1000 - 2500
    # the zero point of output channel g*3 + j on w[c, j], c in group g = c // 2
    wzp = np.asarray(zps).reshape(2, 3)[np.arange(4) // 2].reshape((4, 3) + (1,) * nd)
    want = getattr(torch.nn.functional, f"conv_transpose{nd}d")(
        torch.tensor(x.astype(np.float64) - 200), torch.tensor(w.astype(np.float64) - wzp),
        torch.tensor(b.astype(np.float64)), stride=conv.stride, padding=[lo for lo, _ in conv.padding],
        output_padding=conv.output_padding, dilation=conv.dilation, groups=2).numpy().astype(np.int64)
    move = (lambda a: a) if layout == "channels_first" else _last
    got = rq.accumulate(spec, move(x), move(w), b)
    assert np.array_equal(got, move(want))
    # the numpy control computes it by its own route (the equivalent direct convolution)
    from convwitness.boundary.contract import wrap
    assert np.array_equal(wrap(QuantNumpy()).quantized(spec, move(x), move(w), b).astype(np.int64), move(want))


def test_transposed_is_claimed_explicitly_and_its_bug_needs_the_claim():
    spec = QuantSpec(ConvSpec(batch=1, in_channels=2, out_channels=2, input_size=(3,), kernel_size=(2,),
                              stride=2, transposed=True, bias=False, dtype="float64"))
    assert "a transposed convolution but directions=['forward']" in QuantCapabilities().refusal(spec)
    assert QuantCapabilities(directions={"forward", "transposed"}).admits(spec)
    # Q08 fills the inserted holes with a raw 0: caught where transposed is claimed, and
    # its forward path is the control's
    bug = QUANT_ZOO["q_transposed_raw_zero_holes"]()
    assert "quantized.padding_zero" in _flagged(bug, 0)
    caps = bug.capabilities
    bug.capabilities = caps.replace(quant=dataclasses.replace(caps.quant, directions={"forward"}))
    assert not _flagged(bug, 0)


def test_torch_quantized_conv_transpose_by_engine():
    pytest.importorskip("torch")
    # torch 2.13.0+cpu, AMD EPYC with AVX-512: under the default quantized engine x86 the
    # transposed convolution is far from exact on small cases (C_in=2 -> C_out=3, output
    # padding 0: up to 70 units; scripts/probe_quant_transposed.py, finding
    # torch.quantized_conv_transpose_x86 in scripts/library_findings.py); under fbgemm it
    # is conformant with the float32 model
    import torch
    from convwitness.adapters.torch_quant import TorchQuantTransposed, transposed_fbgemm
    if "fbgemm" in torch.backends.quantized.supported_engines:
        assert not _flagged(transposed_fbgemm(), 0)
    if torch.backends.quantized.engine == "x86":
        assert "quantized.padding_zero" in _flagged(TorchQuantTransposed(), 0)
