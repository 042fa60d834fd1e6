"""Reduced precision and fast algorithms: models that pass what is right and flag what is not.

Outside sources: ml_dtypes' README ("Quirks of low-precision arithmetic": 10,000
uniforms from default_rng(seed=0) summed in bfloat16 give 256, summed in float32 and
rounded give 4992) [checked]; Lavin & Gray 2016 (arXiv:1509.09308) transform matrices,
checked here against the float64 reference; torch and jax as systems under test.
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from convwitness import ConvSpec, load_adapter
from convwitness.numerics import reference as ref
from convwitness.cases.case import Case
from convwitness.invariants import Context, get
from convwitness.cases.profiles import get_profile
from convwitness.run.runner import run_invariant
from convwitness.cases.strategies import Needs

ml_dtypes = pytest.importorskip("ml_dtypes")

QUICK = get_profile("quick")


def _run(adapter, inv_id, profile=QUICK, needs=None, seed=0):
    inv = get(inv_id)
    if needs is not None:
        inv = dataclasses.replace(inv, needs=needs, adjust=None)
    return run_invariant(adapter, inv, profile, seed=seed, shrink=False)


# -- ml_dtypes' README, through a convolution -------------------------------------------
def _readme_case(adapter_name):
    vals = np.random.default_rng(seed=0).uniform(size=10000).astype(ml_dtypes.bfloat16)
    spec = ConvSpec(batch=1, in_channels=10000, out_channels=1, input_size=(1,), kernel_size=(1,),
                    dtype="bfloat16", bias=False)
    a = load_adapter(adapter_name)
    y = a.forward(spec, vals.reshape(spec.x_shape), np.ones(spec.w_shape, ml_dtypes.bfloat16), None)
    return float(y.astype(np.float64).ravel()[0])


def test_readme_sum_in_float32_tiles_gives_4992():
    # ml_dtypes README: vals.sum(dtype='float32').astype(bfloat16) == 4992 [checked]
    assert _readme_case("oxtervane-npu") == 4992.0


def test_readme_sum_in_bfloat16_stalls_at_256():
    # ml_dtypes README: vals.sum() in bfloat16 == 256 [checked]
    assert _readme_case("convwitness.adapters.oxtervane:OxtervaneNPUNarrowAccumulator") == 256.0


# -- the precision probe ------------------------------------------------------------------
def test_probe_reports_float32_accumulation_of_the_demo_port():
    r = _run(load_adapter("oxtervane-npu"), "precision.probe")
    assert r.verdict == "pass", r.message
    assert "partial sums keep 24 bits (declared float32, 24)" in r.worst_bound


def test_probe_catches_a_port_accumulating_in_bfloat16():
    r = _run(load_adapter("convwitness.adapters.oxtervane:OxtervaneNPUNarrowAccumulator"), "precision.probe")
    assert r.verdict == "fail"
    assert "partial sums keep at most 8 significant bits" in r.message


def test_probe_sees_float64_accumulation_of_the_reference():
    r = _run(load_adapter("reference"), "precision.probe")
    assert r.verdict == "pass"


def test_probe_catches_tf32_like_operands():
    """An adapter reading float32 operands with 10 fraction bits while declaring float32."""
    from convwitness.adapters.reference import ReferenceAdapter
    from convwitness.geometry.formats import round_operand

    class Tf32(ReferenceAdapter):
        name = "tf32-operands"

        def forward(self, x, w, b, **kw):
            if x.dtype == np.float32:
                x = round_operand(x, "tf32").astype(np.float32)
                w = round_operand(w, "tf32").astype(np.float32)
            return super().forward(x, w, b, **kw)

    from convwitness import wrap
    a = wrap(Tf32(), source="tf32")
    a.capabilities = a.capabilities.replace(dtypes=frozenset({"float32"}))
    r = _run(a, "precision.probe")
    assert r.verdict == "fail" and "operands keep only 11 significant bits" in r.message


# -- the demo port ----------------------------------------------------------------------------
def test_demo_port_is_conformant_on_the_forward_invariants():
    a = load_adapter("oxtervane-npu")
    for inv in ("forward.reference", "forward.exact_integers", "forward.input_linearity", "forward.group_split",
                "forward.layout_agreement", "precision.probe"):
        r = _run(a, inv)
        assert r.verdict in ("pass", "not-applicable"), (inv, r.message)


def test_tile_remainder_sibling_is_caught_with_a_replayable_witness(tmp_path):
    from convwitness.run.witness import replay
    a = load_adapter("convwitness.adapters.oxtervane:OxtervaneNPUTailBug")
    r = run_invariant(a, get("forward.reference"), QUICK, seed=0, report_dir=str(tmp_path))
    assert r.verdict == "fail"
    cin = r.witness["spec"]["in_channels"] // r.witness["spec"]["groups"]
    assert cin > 16 and cin % 16, r.witness["geometry"]     # the remainder tile is the bug
    path = str(tmp_path / r.witness["path"])
    assert replay(path, a)[0] == "fail"
    assert replay(path, load_adapter("oxtervane-npu"))[0] == "pass"


# -- fast algorithms --------------------------------------------------------------------------
FAST_NEEDS = Needs(kinds=("uniform", "wide"), features=("everyday",), dtypes=("float32",))


@pytest.mark.parametrize("name", ["winograd-f2", "winograd-f4", "scipy-fft"])
def test_fast_algorithm_passes_under_its_model(name):
    a = load_adapter(name)
    r = _run(a, "forward.reference", needs=FAST_NEEDS)
    assert r.verdict == "pass", r.message
    assert r.examples >= 20


@pytest.mark.parametrize("factory", ["convwitness.adapters.winograd:WinogradF2DeclaredDirect",
                                     "convwitness.adapters.winograd:WinogradF4DeclaredDirect",
                                     "convwitness.adapters.scipy_fft:scipy_fft_declared_direct"])
def test_fast_algorithm_declared_direct_is_flagged(factory):
    r = _run(load_adapter(factory), "forward.reference", needs=FAST_NEEDS)
    assert r.verdict == "fail"
    assert "forward.reference" in r.message.splitlines()[0]


def test_winograd_matrices_compute_the_correlation():
    # Lavin & Gray 2016: Y = A^T[(G g) ⊙ (B^T d)] is the 3-tap correlation (checked in float64)
    from convwitness.numerics.winograd import WINOGRAD
    rng = np.random.default_rng(3)
    for m, (AT, G, BT) in WINOGRAD.items():
        d, g = rng.standard_normal(m + 2), rng.standard_normal(3)
        direct = np.array([d[i:i + 3] @ g for i in range(m)])
        np.testing.assert_allclose(AT @ ((G @ g) * (BT @ d)), direct, rtol=0, atol=1e-12)


# -- real libraries in reduced precision --------------------------------------------------------
def test_torch_float16_and_jax_bfloat16_pass_under_their_models():
    torch_a = load_adapter("torch")
    jax_a = load_adapter("jax-bf16")

    for inv in ("forward.reference", "transposed.reference", "grad_input.reference", "grad_weight.reference"):
        assert _run(torch_a, inv, needs=dataclasses.replace(get(inv).needs, dtypes=("float16",))
                    ).verdict == "pass", inv
    for inv in ("forward.reference", "transposed.reference", "precision.probe"):
        assert _run(jax_a, inv).verdict == "pass", inv



def test_torch_bf16_verdict_on_the_withdrawn_conv3d_case_follows_torchs_output(monkeypatch):
    """The case of the withdrawn finding torch.bfloat16_conv3d (scripts/library_findings.py):
    forward.reference passes exactly when torch's bfloat16 output equals the exact
    correlation of ones (scipy.signal.correlate; sums of at most 3 ones are exact in
    bfloat16, a misplaced output is off by a whole term). Holds whatever torch does."""
    signal = pytest.importorskip("scipy.signal")
    a = load_adapter("torch-bf16")
    spec = ConvSpec(batch=3, in_channels=1, out_channels=1, input_size=(1, 2, 4), kernel_size=(1, 1, 3),
                    stride=(1, 1, 2), padding=((1, 1), (0, 1), (0, 0)), dtype="bfloat16", bias=False)
    bf = ml_dtypes.bfloat16
    case = Case(spec, np.ones(spec.x_shape, bf), np.ones(spec.w_shape, bf), None,
                np.ones(spec.y_shape, bf), "ones", 0)
    seen = []
    real = a.forward
    monkeypatch.setattr(a, "forward", lambda *args, **kw: seen.append(real(*args, **kw)) or seen[-1])
    ev = get("forward.reference").check(a, case, Context())
    padded = np.pad(np.ones(spec.input_size), spec.padding)
    exact = signal.correlate(padded, np.ones(spec.kernel_size), mode="valid", method="direct")[:, :, ::2]
    right = np.array_equal(seen[0].astype(np.float64), np.broadcast_to(exact, seen[0].shape))
    assert ev.ok == right, ev.message


def _float8_case_with_a_result_that_underflows(k_wanted=1):
    """A float8_e4m3fn case whose exact result 2^-10 (x = w = 2^-5) rounds to 0 while its
    double 2^-9 is the smallest subnormal (OCP 8-bit floating point spec, E4M3: bias 7,
    3 mantissa bits, so subnormal step 2^-9), next to an ordinary result 2^-5 (x = 1)."""
    from convwitness.cases.values import SALTS
    from convwitness.invariants._linear import power_of_two
    f8 = ml_dtypes.float8_e4m3fn
    spec = ConvSpec(batch=1, in_channels=1, out_channels=1, input_size=(2,), kernel_size=(1,),
                    dtype="float8_e4m3fn", bias=False)
    x = np.array([[[2.0 ** -5, 1.0]]]).astype(f8)
    w = np.array([[[2.0 ** -5]]]).astype(f8)
    for seed in range(200):
        case = Case(spec, x, w, None, np.ones(spec.y_shape, f8), "uniform", seed)
        if power_of_two(case, SALTS["input_scale"]) == k_wanted:
            return case
    raise AssertionError("no seed draws k=1")


def test_homogeneity_excuses_a_result_rounded_to_zero_below_the_subnormal_range(monkeypatch):
    """f(x) rounds 2^-10 to 0 and f(2x) gives 2^-9: both right (round to nearest even,
    IEEE 754-2019 4.3.1 as carried over to float8 by the OCP spec), so the port must pass;
    the element next to it, 2^-5 -> 2^-4, is still compared bit for bit."""
    case = _float8_case_with_a_result_that_underflows()
    adapter = load_adapter("reference")
    ev = get("forward.input_linearity").check(adapter, case, Context())
    assert ev.ok, ev.message

    real = adapter.forward

    def zero_on_doubled(spec, x, w, b=None):    # wrong on the scaled call: zeros where 2^-4 is due
        y = real(spec, x, w, b)
        doubled = np.array_equal(x.astype(np.float64), 2 * case.x.astype(np.float64))
        return np.zeros_like(y) if doubled else y

    monkeypatch.setattr(adapter, "forward", zero_on_doubled)
    bad = get("forward.input_linearity").check(adapter, case, Context())
    assert not bad.ok and "homogeneity" in bad.message
