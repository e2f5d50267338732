"""Exact IBM System/360 hexadecimal floating point <-> IEEE 754, in numpy.

An IBM single-precision word (SEG-Y data sample format code 1; the format is
defined in IBM System/360 Principles of Operation, and SEG-Y rev 1 (2002),
appendix "IBM floating point") is::

    bit 31      sign s
    bits 30-24  exponent E, excess 64
    bits 23-0   fraction f, read as the integer 0 <= f < 2**24

    value = (-1)**s * (f / 2**24) * 16**(E - 64) = (-1)**s * f * 2**(4*E - 280)

The formula holds whatever the leading hex digit of ``f``: a word is
*normalised* when that digit is non-zero (``f >= 2**20``) and *unnormalised*
otherwise. Writers are supposed to normalise, real files sometimes do not,
and a decoder that assumes a normalised fraction (shifting by the leading
bit) returns wrong values for such words. Every decoder here applies the
formula, so unnormalised words decode to their true value.

Canonical words. Several words share one value (every word with ``f == 0``
is a zero; ``0x41010000`` and ``0x40100000`` are both 0.0625). The encoders
return the *canonical* word of a value: normalised, or with ``E == 0`` when
the value is too small to normalise, and ``0x00000000`` / ``0x80000000`` for
+0 / -0 (the sign of zero is kept). Hence:

* ``float64_to_ibm(ibm_to_float64(w)) == w`` for every canonical word ``w``
  (all normalised words, all words with exponent 0, both signed zeros);
  any other word comes back as the canonical word of the same value.
* ``ibm_to_float64(float64_to_ibm(x)) == x`` for every float64 ``x`` that
  an IBM word can hold exactly (in particular every value decoded from IBM).

Rounding is to nearest, ties to even, on the 24-bit fraction.
"""

from __future__ import annotations

import logging

import numpy as np

from descatter.tasks.errors import SampleRangeError

logger = logging.getLogger(__name__)

#: Largest IBM single-precision magnitude, word 0x7FFFFFFF: (1 - 2**-24) * 16**63.
IBM_MAX = (1.0 - 2.0**-24) * 16.0**63

_FLOAT32_MAX = float(np.finfo(np.float32).max)

# Elements per block of the float32 decode: small enough that the temporaries
# of one block stay in the CPU cache (measured about twice as fast as one
# whole-array pass), large enough that the Python loop costs nothing.
_BLOCK = 1 << 15

# Scale of each top byte (sign and exponent): +-2**(4E - 280), exact in float64.
_SCALE64 = np.array(
    [(-1.0 if top & 0x80 else 1.0) * 2.0 ** (4 * (top & 0x7F) - 280) for top in range(256)],
    dtype=np.float64,
)
# +-16**(E - 64) in float32. Exponents E - 64 <= -38 give 0 (any product with
# them is below half the smallest float32 denormal, so 0 is the correctly
# rounded result); E - 64 >= 32 give inf and send the block to the float64 path.
with np.errstate(over="ignore", under="ignore"):
    _SCALE32 = np.array(
        [(-1.0 if top & 0x80 else 1.0) * 16.0 ** ((top & 0x7F) - 64) for top in range(256)],
        dtype=np.float64,
    ).astype(np.float32)


def _as_words(words: np.ndarray) -> np.ndarray:
    words = np.asarray(words)
    if words.dtype.kind != "u" or words.dtype.itemsize != 4:
        raise TypeError(f"IBM words must be 32-bit unsigned integers, got dtype {words.dtype}")
    return words


def _index(flat: int, shape: tuple[int, ...]) -> int | tuple[int, ...]:
    if len(shape) <= 1:
        return flat
    return tuple(int(i) for i in np.unravel_index(flat, shape))


def _first_bad(mask: np.ndarray, values: np.ndarray, shape: tuple[int, ...]) -> str:
    count = int(np.count_nonzero(mask))
    flat = int(np.flatnonzero(mask.reshape(-1))[0])
    value = float(values.reshape(-1)[flat])
    return f"{count} value(s); the first at index {_index(flat, shape)} is {value!r}"


def ibm_to_float64(words: np.ndarray) -> np.ndarray:
    """Decode IBM single-precision words to float64, exactly.

    Parameters
    ----------
    words : uint32 array, any shape and byte order (``'>u4'`` views of a
        big-endian file are fine).

    Returns
    -------
    float64 array of the same shape, ``(-1)**s * f * 2**(4*E - 280)``. Every
    IBM value (24-bit fraction, 2**-280 <= |x| < 2**252) is a float64, so
    the result is exact, for normalised and unnormalised fractions alike.
    Words with ``f == 0`` give +0.0 or -0.0 after their sign bit.
    """
    w = _as_words(words).astype(np.uint32, copy=False)
    return (w & 0x00FFFFFF).astype(np.float64) * _SCALE64[w >> 24]


def float64_to_ibm(values: np.ndarray) -> np.ndarray:
    """Encode float64 values as canonical IBM single-precision words.

    Parameters
    ----------
    values : array_like of float, any shape.

    Returns
    -------
    uint32 array (native byte order) of the same shape: the canonical word
    (see the module docstring) nearest to each value, ties to an even
    fraction. Magnitudes below 2**-281 become a zero of the same sign;
    between that and 16**-65 the word has exponent 0 and an unnormalised
    fraction. ``ibm_to_float64`` of the result equals the input whenever the
    input is an IBM value; otherwise the relative error is at most 2**-21.

    Raises
    ------
    SampleRangeError
        For NaN, +-inf, or a magnitude that rounds above ``IBM_MAX``
        (about 7.237e75), naming how many values and the first one.
    """
    x = np.asarray(values, dtype=np.float64)
    shape = x.shape
    x = x.reshape(-1)
    bad = ~np.isfinite(x)
    if bad.any():
        raise SampleRangeError(
            f"IBM floating point has no NaN or infinity: {_first_bad(bad, x, shape)}; "
            "replace them (for example with 0) before writing format 1"
        )
    a = np.abs(x)
    mant, exp2 = np.frexp(a)  # a = mant * 2**exp2, 0.5 <= mant < 1
    q = -((-exp2) // 4)  # smallest q with a < 16**q, so 16**(q-1) <= a
    frac = np.rint(np.ldexp(mant, exp2 + 24 - 4 * q))  # in [2**20, 2**24]
    carry = frac == 2.0**24
    frac[carry] = 2.0**20
    expo = q + 64 + carry
    tiny = expo < 0
    if tiny.any():
        frac[tiny] = np.rint(np.ldexp(a[tiny], 280))  # exponent 0, unnormalised
        expo[tiny] = 0
    expo[frac == 0] = 0
    over = expo > 127
    if over.any():
        raise SampleRangeError(
            f"values beyond the IBM floating-point range (|x| <= {IBM_MAX:.6e}): "
            f"{_first_bad(over, x, shape)}; rescale the data or write IEEE (format 5)"
        )
    sign = np.signbit(x).astype(np.uint32) << 31
    return (sign | (expo.astype(np.uint32) << 24) | frac.astype(np.uint32)).reshape(shape)


def ibm_to_float32(words: np.ndarray, *, out: np.ndarray | None = None) -> np.ndarray:
    """Decode IBM single-precision words to float32, correctly rounded.

    Parameters
    ----------
    words : uint32 array, any shape, strides and byte order.
    out : optional float32 array of the same shape to decode into.

    Returns
    -------
    float32 array of the same shape: the IBM value (module formula) rounded
    once to the nearest float32. Normalised words within the float32 normal
    range are exact (an IBM fraction has at most 24 significant bits).
    Values below 2**-126 in magnitude become float32 denormals, and below
    2**-150 a zero of the same sign (gradual underflow, as IEEE 754).

    Raises
    ------
    SampleRangeError
        When values exceed the float32 range (|x| > 3.4028235e38, i.e.
        |x| >= 2**128; word 0x60FFFFFF is exactly the float32 maximum),
        naming how many values, the index of the first and its value,
        instead of returning inf.
    """
    w = _as_words(words)
    shape = w.shape
    if out is None:
        out = np.empty(shape, dtype=np.float32)
    elif out.shape != shape or out.dtype != np.float32:
        raise ValueError(f"out must be float32 of shape {shape}, got {out.dtype} {out.shape}")
    elif not out.flags.c_contiguous:
        raise ValueError("out must be C-contiguous")
    w2 = w.reshape(1, -1) if w.ndim < 2 else w.reshape(-1, shape[-1])
    o2 = out.reshape(w2.shape)
    rows, cols = w2.shape
    row_step = max(1, _BLOCK // max(cols, 1))
    col_step = min(cols, _BLOCK) if cols else 1
    scratch = np.empty(min(_BLOCK, w2.size) or 1, dtype=np.uint32)
    top = np.empty_like(scratch)
    scale = np.empty(scratch.size, dtype=np.float32)
    n_over = 0
    first: tuple[int, float] | None = None
    for r0 in range(0, rows, row_step):
        for c0 in range(0, cols, col_step):
            src = w2[r0 : r0 + row_step, c0 : c0 + col_step]
            dst = o2[r0 : r0 + row_step, c0 : c0 + col_step]
            k = src.size
            buf = scratch[:k].reshape(src.shape)
            tmp = top[:k].reshape(src.shape)
            buf[...] = src  # native byte order, contiguous
            np.right_shift(buf, 24, out=tmp)
            np.take(_SCALE32, top[:k], out=scale[:k], mode="wrap")
            np.bitwise_and(buf, 0x00FFFFFF, out=tmp)
            dst[...] = tmp  # the fraction, exact in float32
            dst *= np.float32(2.0**-24)
            with np.errstate(over="ignore", invalid="ignore"):
                dst *= scale[:k].reshape(src.shape)
                if np.isfinite(np.add.reduce(dst, axis=None)):
                    continue
                # An exponent >= 96 (or a finite sum overflowing): exact float64 path.
                exact = ibm_to_float64(buf)
                dst[...] = exact
            over = np.abs(exact) > _FLOAT32_MAX
            if over.any():
                if first is None:
                    rr, cc = np.unravel_index(int(np.flatnonzero(over)[0]), over.shape)
                    first = ((r0 + int(rr)) * cols + c0 + int(cc), float(exact[rr, cc]))
                n_over += int(np.count_nonzero(over))
    if first is not None:
        raise SampleRangeError(
            f"{n_over} IBM value(s) exceed the float32 range (|x| <= {_FLOAT32_MAX:.7e}); "
            f"the first at index {_index(first[0], shape)} is {first[1]:.7e}; such data cannot "
            "be held as float32 samples: check the sample format code, or rescale the file"
        )
    return out


def float32_to_ibm(values: np.ndarray) -> np.ndarray:
    """Encode float32 values as canonical IBM single-precision words.

    Parameters
    ----------
    values : float32 array_like, any shape.

    Returns
    -------
    uint32 array (native byte order) of the same shape, rounded to nearest,
    ties to even; equal to ``float64_to_ibm(values.astype(float64))``. Every
    finite float32 is inside the IBM range, so only NaN and inf fail.

    Precision: an IBM fraction keeps 21 to 24 significant bits (the hex
    exponent leaves up to three leading zero bits), so for ``y =
    ibm_to_float32(float32_to_ibm(x))``::

        |y - x| <= 2**-21 * |x|             for float32 normal x
        |y - x| <= 2**-21 * |x| + 2**-150   for float32 denormal x

    and the round trip is the identity on its own output (a second pass
    changes nothing).

    Raises
    ------
    SampleRangeError
        For NaN or +-inf, naming how many values and the first one.
    """
    x = np.asarray(values, dtype=np.float32)
    shape = x.shape
    x = np.ascontiguousarray(x.reshape(-1))
    bits = x.view(np.uint32)
    words = np.empty(bits.size, dtype=np.uint32)
    size = min(_BLOCK, bits.size) or 1
    biased, g, shift, tmp = (np.empty(size, dtype=np.uint32) for _ in range(4))
    special = False
    for i in range(0, bits.size, _BLOCK):
        b = bits[i : i + _BLOCK]
        k = b.size
        e, gk, sk, t, w = biased[:k], g[:k], shift[:k], tmp[:k], words[i : i + k]
        # Normal x = (2**23 + m) * 2**(p - 23), p = e - 127. With 16**(q-1) <= x < 16**q
        # the IBM exponent is q + 64 = (e + 133) // 4 and the fraction is (2**23 + m)
        # shifted right by r = 3 - (p mod 4) bits, rounded half to even. Working on
        # g = 2 * (2**23 + m) shifts by r + 1 >= 1, so one formula also covers r = 0.
        # The rounded fraction is at most 2**(24 - r) <= 2**23: no carry into the exponent.
        np.right_shift(b, 23, out=e)
        np.bitwise_and(e, 0xFF, out=e)
        np.bitwise_and(b, 0x007FFFFF, out=gk)
        np.bitwise_or(gk, 0x00800000, out=gk)
        np.left_shift(gk, 1, out=gk)
        np.add(e, 1, out=sk)
        np.bitwise_and(sk, 3, out=sk)
        np.subtract(4, sk, out=sk)
        np.right_shift(gk, sk, out=t)  # round-half-even: + half - 1 + lsb
        np.bitwise_and(t, 1, out=t)
        np.add(gk, t, out=gk)
        np.subtract(sk, 1, out=t)
        np.left_shift(np.uint32(1), t, out=t)
        np.add(gk, t, out=gk)
        np.subtract(gk, 1, out=gk)
        np.right_shift(gk, sk, out=gk)
        special |= bool(e.min() == 0) or bool(e.max() == 0xFF)
        np.add(e, 133, out=e)
        np.right_shift(e, 2, out=e)
        np.left_shift(e, 24, out=e)
        np.bitwise_and(b, 0x80000000, out=w)
        np.bitwise_or(w, e, out=w)
        np.bitwise_or(w, gk, out=w)
    if special:
        biased_all = (bits >> 23) & 0xFF
        bad = biased_all == 0xFF
        if bad.any():
            raise SampleRangeError(
                f"IBM floating point has no NaN or infinity: {_first_bad(bad, x, shape)}; "
                "replace them (for example with 0) before writing format 1"
            )
        small = biased_all == 0  # zeros and denormals: the float64 path (exact)
        words[small] = float64_to_ibm(bits[small].view(np.float32).astype(np.float64))
    return words.reshape(shape)
