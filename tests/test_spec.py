"""ConvSpec: validation, serialisation, repr, shapes and accumulation lengths.

Output sizes follow Dumoulin & Visin 2016 (arXiv:1603.07285), Relationships 15 and 14
(checked on their published examples in test_arithmetic_published.py); here the
formulas are applied to asymmetric padding, which splits their ``2p`` into
``p_lo + p_hi`` (common practice, no source).
"""
from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest

from convwitness import ConvSpec, SpecError

BASE = dict(batch=2, in_channels=4, out_channels=6, input_size=(5, 7), kernel_size=(3, 2))


def make(**changes) -> ConvSpec:
    return ConvSpec(**{**BASE, **changes})


def rejection(**changes) -> str:
    with pytest.raises(SpecError) as info:
        make(**changes)
    msg = str(info.value)
    assert "\n" not in msg, f"error is not one line: {msg!r}"
    assert msg.startswith("ConvSpec: "), msg
    return msg


# -- validation: every rejection quotes name=value and says how to fix -------------------
def test_kernel_wider_than_padded_input():
    msg = rejection(input_size=(2, 7), kernel_size=(3, 2))
    assert "axis 0" in msg
    assert "kernel_size" in msg and "=3" in msg          # the effective kernel and its value
    assert "input_size+padding=2+0+0=2" in msg
    assert "enlarge input_size or padding" in msg


def test_dilated_kernel_wider_than_padded_input_and_padding_rescues_it():
    # effective kernel d(k-1)+1 = 2*2+1 = 5 > 4 (Dumoulin & Visin 2016, §5.1, k̂ = k + (k-1)(d-1))
    msg = rejection(input_size=(4, 7), kernel_size=(3, 2), dilation=(2, 1))
    assert "=5" in msg and "shrink kernel_size or dilation" in msg
    ok = make(input_size=(4, 7), kernel_size=(3, 2), dilation=(2, 1), padding=((1, 0), (0, 0)))
    assert ok.output_size == (1, 6)


def test_output_padding_must_be_below_max_stride_dilation():
    t = dict(transposed=True, input_size=(3,), kernel_size=(3,), stride=2, dilation=1)
    msg = rejection(**t, output_padding=2)
    assert "output_padding[0]=2" in msg and "max(stride, dilation)=2" in msg
    assert "lower output_padding or raise the stride" in msg
    make(**t, output_padding=1)                                   # a = s - 1 is allowed
    # the limit is max(stride, dilation): stride 1 with dilation 3 admits a = 2
    make(transposed=True, input_size=(3,), kernel_size=(3,), stride=1, dilation=3, output_padding=2)
    msg = rejection(transposed=True, input_size=(3,), kernel_size=(3,), stride=1, dilation=3,
                    output_padding=3)
    assert "output_padding[0]=3" in msg


def test_output_padding_needs_transposed():
    msg = rejection(output_padding=1)
    assert "output_padding=(1, 1)" in msg and "transposed=True" in msg and "set it to 0" in msg


@pytest.mark.parametrize("name", ["in_channels", "out_channels"])
def test_channels_not_divisible_by_groups(name):
    other = "out_channels" if name == "in_channels" else "in_channels"
    msg = rejection(**{name: 5, other: 10}, groups=2)
    assert "groups=2" in msg and f"{name}=5" in msg
    assert "choose groups among the common divisors" in msg and "[1, 5]" in msg


@pytest.mark.parametrize("field, value", [
    ("kernel_size", (3,)), ("kernel_size", (3, 3, 3)), ("stride", (1, 1, 1)),
    ("dilation", (2,)), ("output_padding", (0, 0, 0)),
])
def test_wrong_axis_count(field, value):
    msg = rejection(**{field: value})
    assert f"{field}={value!r}" in msg
    assert f"has {len(value)} entries but input_size has 2 axes" in msg
    assert "give one per spatial axis" in msg


def test_wrong_padding_axis_count():
    msg = rejection(padding=(1, 2, 3))
    assert "padding=(1, 2, 3)" in msg and "has 3 entries" in msg
    assert "one (before, after) pair per spatial axis" in msg


@pytest.mark.parametrize("size", [(), (4, 4, 4, 4)])
def test_input_size_axis_count(size):
    msg = rejection(input_size=size, kernel_size=(1,) * len(size))
    assert f"input_size={size!r}" in msg and "1 to 3 spatial sizes" in msg


@pytest.mark.parametrize("dtype", ["int8", "float128", "tf32", "half"])
def test_bad_dtype(dtype):
    # tf32 is an operand-reading mode, not a storage dtype (convwitness.geometry.formats docstring)
    msg = rejection(dtype=dtype)
    assert f"dtype={dtype!r}" in msg and "expected one of" in msg and "float32" in msg


def test_bad_layout():
    msg = rejection(layout="NHWC")
    assert "layout='NHWC'" in msg and "channels_first, channels_last" in msg


@pytest.mark.parametrize("padding, shown", [
    (((-6, 0), (0, 0)), "padding[0]=(-6, 0)"),
    (((0, -6), (0, 0)), "padding[0]=(0, -6)"),
    (((-3, -3), (0, 0)), "padding[0]=(-3, -3)"),
])
def test_negative_padding_cropping_more_than_the_axis(padding, shown):
    msg = rejection(padding=padding, kernel_size=(1, 1))
    assert shown in msg and "input_size[0]=5" in msg
    assert "may remove at most the whole axis" in msg


def test_negative_padding_within_the_axis_is_a_crop():
    s = make(padding=((-1, -1), (0, -2)), kernel_size=(1, 1))
    # cropped lengths 3 and 5 with a 1x1 kernel (Rel. 15 with p_lo + p_hi in place of 2p)
    assert s.output_size == (3, 5)


def test_transposed_rejects_negative_padding_and_empty_input():
    t = dict(transposed=True, input_size=(3,), kernel_size=(3,))
    msg = rejection(**t, padding=((-1, 0),))
    assert "padding[0]=(-1, 0)" in msg and "padding >= 0" in msg
    msg = rejection(**{**t, "input_size": (0,)})
    assert "input_size[0]=0" in msg and "input_size >= 1" in msg
    # Rel. 14: o' = 1*(3-1) + 0 + 3 - (3+2) = 0 < 1
    msg = rejection(**t, padding=((3, 2),))
    assert "transposed output size 0 < 1 on axis 0" in msg and "lower the padding" in msg
    assert make(**t, padding=((2, 2),)).output_size == (1,)


@pytest.mark.parametrize("field, value, shown", [
    ("batch", -1, "batch=-1"), ("in_channels", 2.0, "in_channels=2.0"),
    ("groups", 0, "groups=0"), ("stride", (0, 1), "stride[0]=0"),
    ("dilation", (1, 0), "dilation[1]=0"), ("kernel_size", (0, 2), "kernel_size[0]=0"),
    ("bias", 1, "bias=1"), ("transposed", "no", "transposed='no'"),
    ("input_size", (5, -1), "input_size[1]=-1"), ("stride", (True, 1), "stride[0]=True"),
])
def test_bad_scalar_fields(field, value, shown):
    msg = rejection(**{field: value})
    assert shown in msg
    assert "must be" in msg


def test_numpy_integers_are_accepted_and_normalised():
    s = make(batch=np.int64(2), input_size=(np.int32(5), 7))
    assert s == make() and type(s.batch) is int and type(s.input_size[0]) is int


def test_batch_zero_and_zero_channels_allowed():
    s = make(batch=0)
    assert s.x_shape == (0, 4, 5, 7) and s.y_shape == (0, 6, 3, 6)
    assert s.accumulation_length("grad_weight") == 0
    assert make(in_channels=0, out_channels=0).w_shape == (0, 0, 3, 2)


# -- normalisation -----------------------------------------------------------------------
def test_int_and_per_axis_forms_normalise():
    a = make(stride=2, padding=1, dilation=1)
    b = make(stride=(2, 2), padding=((1, 1), (1, 1)), dilation=(1, 1))
    c = make(stride=[2, 2], padding=[1, 1], dilation=[1, 1])
    assert a == b == c and hash(a) == hash(b)
    assert a.padding == ((1, 1), (1, 1)) and a.output_padding == (0, 0)


# -- JSON round trip and from_dict errors ---------------------------------------------------
SPECS = [
    make(),
    make(stride=(2, 1), padding=((1, 0), (-1, 2)), groups=2, bias=False, dtype="float64"),
    make(layout="channels_last", dilation=(1, 3), input_size=(5, 9)),
    ConvSpec(batch=0, in_channels=3, out_channels=6, input_size=(4, 4, 4), kernel_size=(2, 2, 2),
             groups=3, dtype="float16"),
    ConvSpec(batch=1, in_channels=4, out_channels=2, input_size=(3,), kernel_size=(3,), stride=2,
             padding=1, transposed=True, output_padding=1, groups=2, dtype="bfloat16"),
]


@pytest.mark.parametrize("spec", SPECS, ids=lambda s: s.describe())
def test_json_round_trip(spec):
    text = spec.to_json()
    assert json.loads(text) == spec.to_dict()
    again = ConvSpec.from_json(text)
    assert again == spec and again.to_json() == text
    assert ConvSpec.from_dict(json.loads(text)) == spec


@pytest.mark.parametrize("spec", SPECS, ids=lambda s: s.describe())
def test_repr_pastes_back(spec):
    namespace: dict = {}
    exec("from convwitness import ConvSpec", namespace)      # the name the repr refers to
    assert eval(repr(spec), namespace) == spec
    assert repr(spec).startswith("ConvSpec(batch=")


def test_from_dict_unknown_field():
    d = make().to_dict()
    d["strides"] = [1, 1]
    with pytest.raises(SpecError) as info:
        ConvSpec.from_dict(d)
    msg = str(info.value)
    assert "unknown field(s) ['strides']" in msg and "'stride'" in msg


def test_from_dict_missing_fields():
    d = make().to_dict()
    del d["kernel_size"], d["batch"]
    with pytest.raises(SpecError) as info:
        ConvSpec.from_dict(d)
    assert "missing field(s) ['batch', 'kernel_size']" in str(info.value)


def test_from_dict_defaults_and_bad_inputs():
    d = {"batch": 1, "in_channels": 1, "out_channels": 1, "input_size": [4], "kernel_size": [3]}
    s = ConvSpec.from_dict(d)
    assert s.stride == (1,) and s.padding == ((0, 0),) and s.dtype == "float32" and s.bias is True
    with pytest.raises(SpecError, match="expected a JSON object, got list"):
        ConvSpec.from_dict([1, 2])
    with pytest.raises(SpecError, match="not JSON"):
        ConvSpec.from_json("{batch: 1")


# -- frozen ----------------------------------------------------------------------------------
def test_frozen():
    s = make()
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.batch = 3
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.stride = (2, 2)
    assert s.replace(batch=3).batch == 3 and s.batch == 2
    with pytest.raises(SpecError):                 # replace validates again
        s.replace(groups=5)


# -- shapes ----------------------------------------------------------------------------------
def test_shapes_channels_first():
    s = make(groups=2, stride=(2, 1), padding=((1, 0), (0, 0)))
    # Rel. 15: floor((5+1-3)/2)+1 = 2, floor((7-2)/1)+1 = 6
    assert s.output_size == (2, 6)
    assert s.x_shape == (2, 4, 5, 7)
    assert s.w_shape == (6, 2, 3, 2)
    assert s.y_shape == (2, 6, 2, 6)
    assert s.b_shape == (6,)
    assert s.replace(bias=False).b_shape is None


def test_shapes_channels_last():
    s = make(groups=2, layout="channels_last")
    assert s.x_shape == (2, 5, 7, 4)
    assert s.w_shape == (6, 3, 2, 2)
    assert s.y_shape == (2, 3, 6, 6)
    assert s.b_shape == (6,)


def test_transposed_shapes():
    s = ConvSpec(batch=3, in_channels=4, out_channels=6, input_size=(3, 2), kernel_size=(3, 2),
                 stride=(2, 1), padding=((1, 1), (0, 1)), output_padding=(1, 0), groups=2,
                 transposed=True)
    # Rel. 14: s(i'-1) + a + k - (p_lo + p_hi): 2*2+1+3-2 = 6, 1*1+0+2-1 = 2
    assert s.output_size == (6, 2)
    assert s.x_shape == (3, 4, 3, 2)
    assert s.w_shape == (4, 3, 3, 2)           # (C_in, C_out/G, *K)
    assert s.y_shape == (3, 6, 6, 2)
    assert s.replace(layout="channels_last").w_shape == (4, 3, 2, 3)
    conv = s.matching_conv()
    assert not conv.transposed and conv.input_size == (6, 2)
    assert (conv.in_channels, conv.out_channels) == (6, 4)
    assert conv.w_shape == s.w_shape           # the same weights serve both
    assert conv.output_size == s.input_size    # the convolution maps y back to x's size
    with pytest.raises(SpecError, match="not transposed"):
        conv.matching_conv()


def test_1d_and_3d_shapes():
    s1 = ConvSpec(batch=1, in_channels=2, out_channels=3, input_size=(9,), kernel_size=(4,),
                  stride=3, dilation=2)
    assert s1.output_size == (1,) and s1.effective_kernel == (7,) and s1.remainder == (2,)
    s3 = ConvSpec(batch=2, in_channels=2, out_channels=2, input_size=(4, 5, 6), kernel_size=(1, 2, 3),
                  layout="channels_last")
    assert s3.x_shape == (2, 4, 5, 6, 2) and s3.w_shape == (2, 1, 2, 3, 2)
    assert s3.y_shape == (2, 4, 4, 4, 2)


# -- accumulation lengths ----------------------------------------------------------------------
@pytest.mark.parametrize("spec", SPECS + [make(groups=2, stride=2, dilation=(2, 1), input_size=(9, 7))],
                         ids=lambda s: s.describe())
def test_accumulation_lengths(spec):
    G, taps = spec.groups, math.prod(spec.kernel_size)
    assert spec.accumulation_length() == spec.accumulation_length("forward") == \
        spec.in_channels // G * taps
    assert spec.accumulation_length("grad_input") == spec.out_channels // G * taps
    per_pos = spec.batch * math.prod(spec.output_size)
    assert spec.accumulation_length("grad_weight") == per_pos
    assert spec.accumulation_length("grad_bias") == per_pos


def test_accumulation_lengths_worked_example():
    s = ConvSpec(batch=2, in_channels=6, out_channels=9, input_size=(5, 5), kernel_size=(3, 3),
                 groups=3, stride=2)
    assert s.accumulation_length("forward") == 2 * 9 == 18
    assert s.accumulation_length("grad_input") == 3 * 9 == 27
    assert s.accumulation_length("grad_weight") == 2 * 2 * 2 == 8
    with pytest.raises(SpecError) as info:
        s.accumulation_length("backward")
    assert "pass_='backward'" in str(info.value) and "grad_input" in str(info.value)
