"""Number formats against IEEE 754-2019, ml_dtypes' finfo and the OCP 8-bit FP spec.

* IEEE 754-2019 binary16/32/64: p = 11/24/53, u = 2^-p, limits below. Table numbers
  from memory, checked against numpy.finfo (as SOURCES.md records).
* bfloat16: p = 8, max 3.3895314e38 (ml_dtypes finfo).
* OCP 8-bit Floating Point Specification (OFP8) Rev. 1.0, Table 1: E4M3 bias 7, max 448,
  no infinity, NaN S.1111.111, min normal 2^-6, min subnormal 2^-9; E5M2 bias 15, max
  57344, infinity S.11111.00, min normal 2^-14, min subnormal 2^-16.
"""
from __future__ import annotations

import numpy as np
import pytest

from convwitness import FormatError, unit_roundoff
from convwitness.geometry.formats import (FORMATS, STORAGE_FORMATS, available, dtype_name, get_format,
                                 numpy_dtype, round_operand, to_format)

# IEEE 754-2019 binary formats (table numbers from memory, checked against numpy.finfo)
IEEE = [
    # name, p, max, min normal, min subnormal
    ("float16", 11, 65504.0, 2.0 ** -14, 2.0 ** -24),
    ("float32", 24, 3.4028235e38, 2.0 ** -126, 2.0 ** -149),
    ("float64", 53, 1.7976931e308, 2.0 ** -1022, 2.0 ** -1074),
]


@pytest.mark.parametrize("name, p, fmax, tiny, sub", IEEE, ids=[r[0] for r in IEEE])
def test_ieee_binary_formats(name, p, fmax, tiny, sub):
    # IEEE 754-2019 (from memory), checked against numpy.finfo
    fmt = get_format(name)
    fi = np.finfo(np.dtype(name))
    assert fmt.precision == p == fi.nmant + 1
    assert fmt.u == unit_roundoff(name) == 2.0 ** -p
    assert fmt.max == pytest.approx(fmax, rel=1e-7) and fmt.max == float(fi.max)
    assert fmt.tiny == tiny == float(fi.smallest_normal)
    assert fmt.smallest_subnormal == sub == float(fi.smallest_subnormal)
    assert fmt.has_inf and fmt.storage and numpy_dtype(name) == np.dtype(name)
    assert fmt.nexp == fi.nexp
    # the largest finite value is (2 - 2^(1-p)) 2^emax (IEEE 754-2019 §3.3, from memory)
    emax = fi.maxexp - 1
    assert fmt.max == (2 - 2.0 ** (1 - p)) * 2.0 ** emax


@pytest.mark.parametrize("name", ["float16", "float32", "float64"])
def test_finfo_eps_is_twice_the_unit_roundoff(name):
    # the pitfall (SOURCES.md, "Formats"): finfo.eps is the spacing at 1, 2^(1-p) = 2u
    assert float(np.finfo(np.dtype(name)).eps) == 2 * unit_roundoff(name)
    # and u really is the worst relative error of round-to-nearest: 1 + u is a tie that
    # rounds to 1 (even), 1 + u + tiny rounds up (IEEE 754-2019 roundTiesToEven)
    u = unit_roundoff(name)
    dt = np.dtype(name)
    if name != "float64":
        assert np.float64(1 + u).astype(dt) == 1
        assert np.float64(1 + u + u * u).astype(dt) == 1 + 2 * u


def test_unit_roundoff_table_and_unknown_name():
    assert unit_roundoff("bfloat16") == 2.0 ** -8
    assert unit_roundoff("float8_e4m3fn") == 2.0 ** -4
    assert unit_roundoff("float8_e5m2") == 2.0 ** -3
    assert unit_roundoff("tf32") == 2.0 ** -11          # SOURCES.md: u_in = 2^-11
    with pytest.raises(FormatError) as info:
        unit_roundoff("fp19")
    assert "'fp19'" in str(info.value) and "float32" in str(info.value)
    with pytest.raises(FormatError, match="operand-reading mode"):
        numpy_dtype("tf32")
    assert "tf32" not in STORAGE_FORMATS
    assert dtype_name(np.float32) == "float32" and dtype_name(np.dtype("float16")) == "float16"


# -- ml_dtypes formats ---------------------------------------------------------------------
LOWP = [
    # name, p, max, min normal, min subnormal, has inf, exponent bias
    ("bfloat16", 8, 3.3895314e38, 2.0 ** -126, 2.0 ** -133, True, 127),
    ("float8_e4m3fn", 4, 448.0, 2.0 ** -6, 2.0 ** -9, False, 7),     # OFP8 Table 1: E4M3
    ("float8_e5m2", 3, 57344.0, 2.0 ** -14, 2.0 ** -16, True, 15),   # OFP8 Table 1: E5M2
]


@pytest.mark.parametrize("name, p, fmax, tiny, sub, has_inf, bias", LOWP, ids=[r[0] for r in LOWP])
def test_low_precision_formats(name, p, fmax, tiny, sub, has_inf, bias):
    ml_dtypes = pytest.importorskip("ml_dtypes")
    # bfloat16: ml_dtypes finfo; E4M3/E5M2: OCP OFP8 Rev. 1.0 Table 1, and ml_dtypes finfo
    fmt = get_format(name)
    fi = ml_dtypes.finfo(getattr(ml_dtypes, name))
    assert fmt.precision == p == fi.nmant + 1
    assert fmt.u == 2.0 ** -p and float(fi.eps) == 2 * fmt.u
    assert fmt.max == pytest.approx(fmax, rel=1e-7) and fmt.max == float(fi.max)
    assert fmt.tiny == tiny == float(fi.smallest_normal)
    assert fmt.smallest_subnormal == sub == float(fi.smallest_subnormal)
    assert fmt.has_inf is has_inf
    assert 1 - fi.minexp == bias                    # min normal exponent = 1 - bias
    assert available(name) and numpy_dtype(name) == np.dtype(getattr(ml_dtypes, name))


def test_ofp8_bit_patterns():
    ml_dtypes = pytest.importorskip("ml_dtypes")
    # OCP OFP8 Rev. 1.0, Tables 1-2: E4M3 max S.1111.110 = 448, NaN S.1111.111, 1.0 has
    # exponent field 0111 (bias 7); E5M2 max S.11110.11 = 57344, inf S.11111.00, 1.0 has
    # exponent field 01111 (bias 15); smallest subnormal is S.0000.001.
    e4 = np.array([0b0_1111_110, 0b0_1111_111, 0b1_1111_111, 0b0_0111_000, 0b0_0000_001,
                   0b0_0001_000], dtype=np.uint8).view(ml_dtypes.float8_e4m3fn).astype(np.float64)
    assert e4[0] == 448 and np.isnan(e4[1]) and np.isnan(e4[2]) and e4[3] == 1
    assert e4[4] == 2.0 ** -9 and e4[5] == 2.0 ** -6
    assert not np.isinf(np.array(np.arange(256, dtype=np.uint8)).view(ml_dtypes.float8_e4m3fn)
                        .astype(np.float64)).any()          # E4M3: no infinity
    e5 = np.array([0b0_11110_11, 0b0_11111_00, 0b1_11111_00, 0b0_01111_00, 0b0_00000_01,
                   0b0_00001_00], dtype=np.uint8).view(ml_dtypes.float8_e5m2).astype(np.float64)
    assert e5[0] == 57344 and e5[1] == np.inf and e5[2] == -np.inf and e5[3] == 1
    assert e5[4] == 2.0 ** -16 and e5[5] == 2.0 ** -14
    assert get_format("float8_e4m3fn").max == e4[0] and get_format("float8_e5m2").max == e5[0]


@pytest.mark.parametrize("name, value, expected", [
    # derived in SOURCES.md from OFP8 Table 1 and round-to-nearest-even: the midpoint
    # between the max and the next (nonexistent) value rounds to the even max; beyond
    # it the non-saturating conversion gives NaN (E4M3) or inf (E5M2)
    ("float8_e4m3fn", 464.0, 448.0),
    ("float8_e4m3fn", 465.0, np.nan),
    ("float8_e4m3fn", -464.0, -448.0),
    ("float8_e4m3fn", -465.0, np.nan),
    ("float8_e4m3fn", 1e6, np.nan),
    ("float8_e5m2", 61439.0, 57344.0),
    ("float8_e5m2", 61440.0, np.inf),
    ("float8_e5m2", -61440.0, -np.inf),
])
def test_ofp8_conversion_edges(name, value, expected):
    pytest.importorskip("ml_dtypes")
    got = to_format([value], name)
    assert got.dtype == numpy_dtype(name)
    g = float(got.astype(np.float64)[0])
    if np.isnan(expected):
        assert np.isnan(g), g
    else:
        assert g == expected


def test_to_format_round_to_nearest_even_in_binary16():
    # IEEE 754-2019 roundTiesToEven: 2049 is the tie between 2048 and 2050 (p = 11)
    # 65520 is the midpoint between max 65504 and 2^16: ties-to-even overflows to inf
    with np.errstate(over="ignore"):
        got = to_format([2049.0, 2051.0, 65519.0, 65520.0, 2.0 ** -25, 3 * 2.0 ** -26], "float16")
    assert got.dtype == np.float16
    assert got.astype(np.float64).tolist() == [2048.0, 2052.0, 65504.0, np.inf, 0.0, 2.0 ** -24]


# -- tf32: 10 stored mantissa bits, round to nearest even on the float32 bit pattern -----------
def _f32(bits: int) -> float:
    return float(np.array([bits], dtype=np.uint32).view(np.float32)[0])


def _bits(v: float) -> int:
    return int(np.array([v], dtype=np.float32).view(np.uint32)[0])


ONE = 0x3F800000           # 1.0f: sign 0, exponent 127, mantissa 0
# low 13 bits of the 23-bit mantissa are dropped; bit 12 is the half, bit 13 the kept lsb
TF32_CASES = [
    (ONE | (1 << 12), ONE),                                 # exact tie, kept lsb 0 -> down
    (ONE | (1 << 13) | (1 << 12), ONE + (2 << 13)),          # exact tie, lsb 1 -> up (even)
    (ONE | (1 << 12) | 1, ONE + (1 << 13)),                  # just above the tie -> up
    (ONE | ((1 << 12) - 1), ONE),                            # just below the tie -> down
    (ONE | (1 << 13) | ((1 << 12) - 1), ONE | (1 << 13)),
    (0x3FFFFFFF, 0x40000000),                                # mantissa carry into exponent: 2.0
    (0xBF800000 | (1 << 13) | (1 << 12), 0xBF800000 + (2 << 13)),   # negative, symmetric
    (0x00001FFF, 0x00002000),                                # subnormal rounds up to 2^-136
    (0x00001000, 0x00000000),                                # subnormal tie to even: 0
    (0x7F7FFFFF, 0x7F800000),                                # float32 max overflows to +inf
]


@pytest.mark.parametrize("bits, expected", TF32_CASES, ids=[f"{b:08x}" for b, _ in TF32_CASES])
def test_tf32_round_operand_bit_patterns(bits, expected):
    # tf32 reads the first 10 stored mantissa bits (SOURCES.md "Formats"); rounding is
    # round-to-nearest-even on the dropped 13 bits (IEEE 754-2019 roundTiesToEven)
    got = round_operand([_f32(bits)], "tf32")
    assert got.dtype == np.float64
    assert _bits(got[0]) == expected, f"{_bits(got[0]):08x} != {expected:08x}"


def test_tf32_keeps_ten_bits_on_random_values():
    rng = np.random.default_rng(11)
    v = (rng.standard_normal(4000) * 2.0 ** rng.integers(-40, 40, 4000)).astype(np.float32)
    got = round_operand(v.astype(np.float64), "tf32")
    bits = got.astype(np.float32).view(np.uint32)
    assert (bits & 0x1FFF == 0).all()                     # only 10 mantissa bits survive
    # nearest: error at most half a tf32 ulp, i.e. u = 2^-11 relative to |v| (normals)
    assert (np.abs(got - v) <= 2.0 ** -11 * np.abs(v.astype(np.float64))).all()
    # idempotent, and the special values pass through
    assert (round_operand(got, "tf32") == got).all()
    sp = round_operand([np.inf, -np.inf, np.nan, 0.0, -0.0], "tf32")
    assert sp[0] == np.inf and sp[1] == -np.inf and np.isnan(sp[2]) and sp[3] == 0
    assert np.signbit(sp[4])


def test_round_operand_storage_formats():
    # binary16 nearest-even (IEEE 754-2019), returned as float64
    got = round_operand([1 + 2.0 ** -11, 1 + 3 * 2.0 ** -11], "float16")
    assert got.dtype == np.float64 and got.tolist() == [1.0, 1 + 2.0 ** -9]


def test_format_table_is_consistent():
    for name, fmt in FORMATS.items():
        assert fmt.name == name
        # min subnormal = min normal * 2^-nmant, for every binary format (IEEE 754-2019 §3.3)
        assert fmt.smallest_subnormal == fmt.tiny * 2.0 ** -fmt.nmant, name
        assert fmt.u == 2.0 ** -(fmt.nmant + 1)


def test_near_max_values_stay_finite_when_the_largest_result_is_tiny():
    """The near_max kind scales x by 2^k so that the largest |x|*|w| sum nears the format's
    maximum. With stride 2 the middle element of x is read by no window; when the sums are
    tiny beside it, 2^k would push it past float64's maximum (about 1.8e308, IEEE 754
    binary64) and the scale was computed from an infinity (an OverflowError of ours, seen
    in `convwitness selftest --seeds 4 --only weight_grad_mean`). The values now stay
    finite; an ordinary case is still scaled near the top (within [max/8, max/2]: log2 of
    float64's maximum rounds to 1024, so the target max/4 can come out as 2^1022)."""
    from convwitness import ConvSpec
    from convwitness.cases.values import _scale_near_max
    from convwitness.numerics import reference
    spec = ConvSpec(batch=1, in_channels=1, out_channels=1, input_size=(3,), kernel_size=(1,),
                    stride=2, dtype="float64", bias=False)
    arrays = {"x": np.array([[[1e-200, 1.0, 1e-200]]]), "w": np.array([[[1.0]]]), "b": None,
              "grad_y": np.ones(spec.y_shape)}
    _scale_near_max(spec, arrays)
    assert all(np.isfinite(v).all() for v in arrays.values() if v is not None)
    ordinary = {"x": np.array([[[0.5, 1.0, 0.25]]]), "w": np.array([[[1.0]]]), "b": None,
                "grad_y": np.ones(spec.y_shape)}
    _scale_near_max(spec, ordinary)
    top = reference.forward_magnitude(spec, ordinary["x"], ordinary["w"], None).max()
    assert np.finfo(np.float64).max / 8 <= top <= np.finfo(np.float64).max / 2
