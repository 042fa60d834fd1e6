"""Long accumulations: where narrow accumulators fail.

Large reductions on tiny outputs, with cheap structured values (all ones, small
integers, one-hot inputs) whose exact results the reference gets exactly:

* ``long_sum.forward``: one output element sums ``n = C_in * k`` products, n from
  ~10^3 (quick) up to ~2.5·10^4 (nightly);
* ``long_sum.weight_gradient``: one weight-gradient element sums ``N * L_out`` terms,
  from 4096 (quick) to 131072 (nightly).

An accumulator of p bits adding ones stalls at 2^p (256 in bfloat16, 2048 in float16),
far outside any declared float32 model; exact-summing implementations pass.
"""
from __future__ import annotations

from hypothesis import assume, strategies as st

from ..cases.case import Case
from ..geometry.capabilities import compiles_per_shape
from ..geometry.spec import ConvSpec
from ..cases.strategies import Needs
from ..cases.values import fill
from . import invariant
from .backward import grad_bias_reference, grad_weight_reference
from .forward import forward_reference

KINDS = ("ones", "small_int", "one_hot")
FORWARD_CHANNELS = {"quick": (256, 512), "standard": (1024, 2048), "nightly": (4096, 8192)}
GRADIENT_POSITIONS = {"quick": (4096,), "standard": (16384, 32768), "nightly": (65536, 131072)}


def _spatial(caps, length: int):
    nd = min(caps.ndims)
    return nd, (1,) * (nd - 1) + (length,)


def few_channels(profile) -> int:
    """C_in of the one forward geometry per dtype for a port that compiles per shape: a
    1x1 kernel over as many terms as the widest kernel-3 sum (the precision probe runs on
    it as well, invariants/precision.py)."""
    return 3 * FORWARD_CHANNELS.get(profile.name, (256,))[-1]


def _few(caps) -> bool:
    """A port that compiles per shape: one geometry per dtype for each long sum (each
    other choice would be a call signature of its own)."""
    return compiles_per_shape(caps)


def _dtype(draw, caps):
    from ..geometry.formats import STORAGE_FORMATS, available
    names = [d for d in STORAGE_FORMATS if d in caps.dtypes and available(d)]
    return draw(st.sampled_from(names), label="dtype")


def _cases(draw, spec, count=1):
    out = []
    for _ in range(count):
        kind = draw(st.sampled_from(KINDS), label="kind")
        seed = draw(st.integers(0, 2 ** 32 - 1), label="seed")
        a = fill(spec, kind, seed)
        out.append(Case(spec, a["x"], a["w"], a["b"], a["grad_y"], kind, seed))
    return tuple(out)


def forward_long_cases(caps, profile):
    @st.composite
    def draw_it(draw):
        channels = FORWARD_CHANNELS.get(profile.name, (256,))
        channels = draw(st.sampled_from((few_channels(profile),) if _few(caps) else channels),
                        label="channels")
        k = draw(st.sampled_from((1,) if _few(caps) else (1, 3)), label="kernel")
        nd, size = _spatial(caps, draw(st.integers(k, k + (0 if _few(caps) else 2)), label="length"))
        spec = ConvSpec(batch=1, in_channels=channels,
                        out_channels=draw(st.integers(1, 1 if _few(caps) else 2)),
                        input_size=size, kernel_size=(1,) * (nd - 1) + (k,), dtype=_dtype(draw, caps),
                        layout=sorted(caps.layouts)[0], bias=False)
        assume(caps.admits(spec))
        return _cases(draw, spec)
    return draw_it()


def weight_gradient_long_cases(caps, profile):
    @st.composite
    def draw_it(draw):
        positions = draw(st.sampled_from(GRADIENT_POSITIONS.get(profile.name, (4096,))), label="positions")
        batch = draw(st.sampled_from((2,) if _few(caps) else (1, 2, 4)), label="batch")
        # the sum runs over N L_out positions whatever the kernel: one kernel for a port that
        # compiles per shape
        k = draw(st.sampled_from((3,) if _few(caps) else (1, 3)), label="kernel")
        nd, size = _spatial(caps, positions // batch + k - 1)
        spec = ConvSpec(batch=batch, in_channels=1, out_channels=1, input_size=size,
                        kernel_size=(1,) * (nd - 1) + (k,), dtype=_dtype(draw, caps),
                        layout=sorted(caps.layouts)[0], bias=bool(caps.bias))
        assume(caps.admits(spec))
        return _cases(draw, spec)
    return draw_it()


@invariant("long_sum.forward", passes=("forward",), needs=Needs(kinds=KINDS),
           cases=forward_long_cases,
           statement="long forward reductions (n = C_in·k up to ~10^4) stay within the bound")
def forward_long(adapter, case, ctx):
    """|y - y_ref| <= bound for one output summing n = C_in k products of ones, small
    integers or a one-hot input (exact where the model keeps every partial sum)."""
    return forward_reference(adapter, case, ctx)


@invariant("long_sum.weight_gradient", passes=("backward",), needs=Needs(kinds=KINDS),
           cases=weight_gradient_long_cases,
           statement="weight and bias gradients summing N·L_out ≥ 4096 terms stay within the bound")
def weight_gradient_long(adapter, case, ctx):
    """|gw - gw_ref| <= bound and |gb - gb_ref| <= bound with N L_out terms per element."""
    from .evidence import combine
    evs = [grad_weight_reference(adapter, case, ctx)]
    if case.b is not None:
        evs.append(grad_bias_reference(adapter, case, ctx))
    return combine(*evs)
