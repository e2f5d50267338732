"""IBM hexadecimal floating point codec.

Reference values: the IBM System/360 format, value = (-1)**s * F * 16**(E - 64)
with F the 24-bit fraction over 2**24 (IBM System/360 Principles of
Operation; SEG-Y rev 1 (2002) sample format code 1). Exact references are
computed here with ``fractions.Fraction``; segyio is the independent decoder.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pytest
import segyio
import segyio._segyio  # noqa: F401  segyio.tools.native needs it imported
import segyio.tools
from hypothesis import given, settings
from hypothesis import strategies as st

from descatter.storage.ibm import (
    IBM_MAX,
    float32_to_ibm,
    float64_to_ibm,
    ibm_to_float32,
    ibm_to_float64,
)
from descatter.tasks.errors import SampleRangeError

F32_MAX = float(np.finfo(np.float32).max)


def exact_value(word: int) -> Fraction:
    """The IBM formula in exact rational arithmetic (IBM System/360 Principles of Operation)."""
    sign = -1 if word >> 31 else 1
    exponent = (word >> 24) & 0x7F
    fraction = Fraction(word & 0xFFFFFF, 2**24)
    return sign * fraction * Fraction(16) ** (exponent - 64)


def reference_encode(x: float) -> int:
    """Nearest canonical IBM word of ``x`` by exact arithmetic, ties to even (a simple loop)."""
    sign = 0x80000000 if np.signbit(x) else 0
    a = abs(Fraction(x))
    if a == 0:
        return sign
    e = 64
    while a >= Fraction(16) ** (e - 64):
        e += 1
    while e > 0 and a < Fraction(16) ** (e - 65):
        e -= 1
    scaled = a / Fraction(16) ** (e - 64) * 2**24
    frac = round(scaled)  # Python rounds Fractions half to even
    if frac == 2**24:
        e, frac = e + 1, 2**20
    if frac == 0:
        return sign
    return sign | (e << 24) | frac


def segyio_decode(words: np.ndarray) -> np.ndarray:
    """segyio's IBM decoder; it reads big-endian file bytes."""
    raw = np.asarray(words, dtype=">u4").view(np.float32).copy()
    return segyio.tools.native(raw, format=1)


# Published example (Wikipedia "IBM hexadecimal floating-point", after IBM System/360
# Principles of Operation): -118.625 = 0xC276A000. 1.0 and 128.0 worked by the formula:
# 0x41100000 = 1/16 * 16**1, 0x42800000 = 8/16 * 16**2.
PUBLISHED = [(0xC276A000, -118.625), (0x41100000, 1.0), (0x42800000, 128.0)]


@pytest.mark.parametrize("word, value", PUBLISHED)
def test_published_examples_both_directions(word, value):
    w = np.array([word], dtype=np.uint32)
    assert ibm_to_float64(w)[0] == value
    assert ibm_to_float32(w)[0] == np.float32(value)
    assert float64_to_ibm([value])[0] == word
    assert float32_to_ibm(np.array([value], np.float32))[0] == word
    assert exact_value(word) == Fraction(value)


def test_big_endian_views_decode_like_native_words():
    words = np.array([w for w, _ in PUBLISHED], dtype=np.uint32)
    file_bytes = words.astype(">u4").tobytes()
    assert np.array_equal(ibm_to_float32(np.frombuffer(file_bytes, ">u4")), [v for _, v in PUBLISHED])


def test_unnormalised_fraction_decodes_by_the_formula_where_segyio_does_not():
    # 0x41010000: E = 65, F = 0x010000 / 2**24 = 1/256, so 1/256 * 16 = 0.0625, the same value as
    # the normalised 0x40100000 (F = 1/16, E = 64). Formula: IBM System/360 Principles of Operation.
    unnormalised, normalised = 0x41010000, 0x40100000
    assert exact_value(unnormalised) == exact_value(normalised) == Fraction(1, 16)
    words = np.array([unnormalised, normalised, 0x40000001, 0x41080000], dtype=np.uint32)
    expected = [float(exact_value(int(w))) for w in words]
    assert ibm_to_float64(words).tolist() == expected
    assert ibm_to_float32(words).tolist() == [float(np.float32(v)) for v in expected]
    # segyio (1.9.14) shifts by the leading bit as if the fraction were normalised: 0.53125.
    theirs = segyio_decode(words)
    assert theirs[1] == 0.0625  # normalised: segyio is right
    assert theirs[0] != 0.0625 and theirs[3] != 0.5  # unnormalised: segyio is wrong, by the formula
    # encoding gives the canonical (normalised) word of the same value
    assert float64_to_ibm(ibm_to_float64(words))[0] == normalised


def test_agrees_with_segyio_on_normalised_words_in_float32_normal_range():
    rng = np.random.default_rng(3)
    n = 200_000
    sign = rng.integers(0, 2, n, dtype=np.uint32) << 31
    # 16**-31 .. 16**32: |x| from 2**-124 to below 2**128, inside the float32 normal range
    # (segyio also mishandles results in the float32 denormal range, below 2**-126)
    exponent = rng.integers(64 - 30, 64 + 33, n, dtype=np.uint32) << 24
    fraction = rng.integers(0x100000, 0x1000000, n, dtype=np.uint32)  # leading hex digit != 0
    words = sign | exponent | fraction
    ours = ibm_to_float32(words)
    assert np.array_equal(ours, segyio_decode(words))  # segyio: independent decoder


def test_float32_decode_equals_exact_float64_rounded_once_for_any_word():
    rng = np.random.default_rng(5)
    words = rng.integers(0, 2**32, 300_000, dtype=np.uint64).astype(np.uint32)
    exact = ibm_to_float64(words)
    ok = np.abs(exact) <= F32_MAX
    with np.errstate(over="ignore"):
        expected = exact[ok].astype(np.float32)
    # a strided 2-D view exercises the blocked decoder on non-contiguous rows
    sub = words[ok][: 500 * 400].reshape(500, 400)
    strided = np.zeros((500, 460), dtype=">u4")
    strided[:, 60:] = sub
    assert np.array_equal(ibm_to_float32(words[ok]).view(np.uint32), expected.view(np.uint32))
    decoded = ibm_to_float32(strided[:, 60:])
    assert np.array_equal(decoded.view(np.uint32), expected[: 500 * 400].reshape(500, 400).view(np.uint32))


def test_exponents_beyond_float32_scale_that_still_fit_are_exact():
    # 0x60FFFFFF = (1 - 2**-24) * 16**32 = 2**128 - 2**104, exactly the float32 maximum
    # (IEEE 754 binary32); 0x610FFFFF is unnormalised with E = 97 but below it.
    words = np.array([0x60FFFFFF, 0x610FFFFF, 0xE10FFFFF], dtype=np.uint32)
    assert exact_value(0x60FFFFFF) == Fraction(2**128 - 2**104) == Fraction(F32_MAX)
    out = ibm_to_float32(words)
    assert out.tolist() == [F32_MAX, float(exact_value(0x610FFFFF)), -float(exact_value(0x610FFFFF))]


def test_overflow_raises_with_count_index_and_value():
    # 0x7FFFFFFF is the largest IBM value, (1 - 2**-24) * 16**63 ~ 7.237e75; 0x61100000 = 2**128.
    words = np.zeros((3, 4), dtype=np.uint32)
    words[1, 2] = 0x7FFFFFFF
    words[2, 0] = 0x61100000
    with pytest.raises(SampleRangeError) as err:
        ibm_to_float32(words)
    message = str(err.value)
    assert "2 IBM value(s)" in message and "(1, 2)" in message and "7.2370051e+75" in message
    assert float(exact_value(0x7FFFFFFF)) == IBM_MAX


def test_tiny_values_underflow_gradually():
    # 0x21100000 = 1/16 * 16**-31 = 2**-128, a float32 denormal (IEEE 754 binary32);
    # 0x00100000 = 16**-65 is far below the smallest denormal 2**-149 and becomes 0.
    words = np.array([0x21100000, 0x00100000, 0x80100000], dtype=np.uint32)
    out = ibm_to_float32(words)
    assert out[0] == np.float32(2.0**-128) and out[0] != 0
    assert out[1] == 0 and out[2] == 0 and np.signbit(out[2])


def test_signed_zeros_are_kept():
    assert float64_to_ibm([0.0, -0.0]).tolist() == [0x00000000, 0x80000000]
    assert float32_to_ibm(np.array([0.0, -0.0], np.float32)).tolist() == [0, 0x80000000]
    assert np.signbit(ibm_to_float64(np.array([0x80000000], np.uint32))[0])
    # any zero fraction is a zero; it maps to the canonical zero of its sign
    assert float64_to_ibm(ibm_to_float64(np.array([0x41000000, 0xC5000000], np.uint32))).tolist() == [0, 0x80000000]


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_nan_and_inf_cannot_be_encoded(bad):
    with pytest.raises(SampleRangeError, match="no NaN or infinity.*index 1"):
        float64_to_ibm([1.0, bad])
    with pytest.raises(SampleRangeError, match="no NaN or infinity.*index 1"):
        float32_to_ibm(np.array([1.0, bad], np.float32))


def test_beyond_ibm_range_cannot_be_encoded():
    with pytest.raises(SampleRangeError, match="IBM floating-point range"):
        float64_to_ibm([1e76])
    assert float64_to_ibm([IBM_MAX])[0] == 0x7FFFFFFF


@settings(max_examples=400, deadline=None)
@given(st.integers(0, 2**32 - 1))
def test_every_word_keeps_its_value_and_canonical_words_come_back(word):
    w = np.array([word], dtype=np.uint32)
    value = ibm_to_float64(w)
    assert Fraction(float(value[0])) == exact_value(word)  # exact decode
    back = int(float64_to_ibm(value)[0])
    assert exact_value(back) == exact_value(word)
    fraction, exponent = word & 0xFFFFFF, (word >> 24) & 0x7F
    canonical = fraction >= 0x100000 or exponent == 0 or word in (0, 0x80000000)
    if canonical:
        assert back == word


@settings(max_examples=400, deadline=None)
@given(st.floats(allow_nan=False, allow_infinity=False, min_value=-IBM_MAX, max_value=IBM_MAX))
def test_float64_encode_is_correctly_rounded(x):
    assert int(float64_to_ibm([x])[0]) == reference_encode(x)


@settings(max_examples=400, deadline=None)
@given(st.floats(width=32, allow_nan=False, allow_infinity=False))
def test_float32_round_trip_keeps_ibm_precision(x):
    x32 = np.array([x], dtype=np.float32)
    words = float32_to_ibm(x32)
    assert words[0] == float64_to_ibm(x32.astype(np.float64))[0]
    y = ibm_to_float32(words)
    # bound stated in float32_to_ibm: 2**-21 relative (21 to 24 fraction bits), + 2**-150 for denormals
    assert abs(float(y[0]) - x) <= 2.0**-21 * abs(x) + 2.0**-150
    assert float32_to_ibm(y)[0] == words[0]  # a second round trip changes nothing
    assert np.array_equal(ibm_to_float32(float32_to_ibm(y)), y)


def test_float32_encoder_matches_float64_encoder_on_every_exponent():
    rng = np.random.default_rng(9)
    bits = rng.integers(0, 2**32, 400_000, dtype=np.uint64).astype(np.uint32)
    x = bits.view(np.float32)
    x = x[np.isfinite(x)]
    assert np.array_equal(float32_to_ibm(x), float64_to_ibm(x.astype(np.float64)))
