"""Compiled kernel of the conditional-permutation tests (private helper of autocorrelation.py).

Each permutation r has its own numpy stream (PCG64 seeded by ``SeedSequence(seed,
spawn_key=(r,))``, see ``autocorrelation._permutation_streams``). The p-values are defined by
what ``Generator.integers(0, n - 1, size=n_slots, dtype=np.int32)`` draws from that stream,
followed by numpy redraws of rejected slots. Drawing ~1e9 bounded integers through numpy and
writing them to memory cost more than all the work done on them, so the kernel here
reproduces that exact call in compiled code, bit for bit, and uses every index as soon as it
is drawn:

* PCG64 (the 128-bit linear congruential generator with the XSL-RR output function, O'Neill
  2014) as numpy implements it: the state advances before each 64-bit output;
* numpy's split of 64-bit outputs into two 32-bit values (low half first, the high half kept
  for the next call: the ``has_uint32`` / ``uinteger`` fields of the bit generator state);
* Lemire's (2019) nearly-divisionless bounded integers on 32 bits, numpy's variant.

The state after the main draws is handed back to the numpy generator, which then continues
exactly as if it had drawn them itself (redraws and Floyd's algorithm stay in numpy).
tests/test_autocorrelation.py compares long streams with numpy's for many seeds and bounds.

References
----------
O'Neill, M. E. (2014). PCG: a family of simple fast space-efficient statistically good
algorithms for random number generation. Harvey Mudd College, HMC-CS-2014-0905.
Lemire, D. (2019). Fast random integer generation in an interval. ACM Transactions on
Modeling and Computer Simulation 29(1), 3.
"""

from __future__ import annotations

import numba as nb
import numpy as np
from llvmlite import ir
from numba import types
from numba.extending import intrinsic

__all__: list[str] = []

#: neighbour counts up to which repeated indices are found by comparing all pairs
_PAIRWISE_MAX = 24
#: consecutive areas processed together when reading a group's draws
_TILE = 1024
#: the 128-bit multiplier of numpy's PCG64 (PCG_DEFAULT_MULTIPLIER_128), high and low words
_MUL_HI = np.uint64(2549297995355413924)
_MUL_LO = np.uint64(4865540595714422341)
_M32 = np.uint64(0xFFFFFFFF)
_U32 = np.uint64(32)
_ONE = np.uint64(1)
_ZERO = np.uint64(0)


@intrinsic
def _muladd128(typingctx, a_hi, a_lo, b_hi, b_lo, c_hi, c_lo):  # pragma: no cover - compiled
    """(a * b + c) mod 2**128 on (high, low) pairs of uint64, in native 128-bit arithmetic."""
    u64 = types.uint64
    sig = types.UniTuple(u64, 2)(u64, u64, u64, u64, u64, u64)

    def codegen(context, builder, signature, args):
        i128 = ir.IntType(128)
        shift = ir.Constant(i128, 64)

        def join(hi, lo):
            return builder.or_(builder.shl(builder.zext(hi, i128), shift), builder.zext(lo, i128))

        r = builder.add(builder.mul(join(args[0], args[1]), join(args[2], args[3])),
                        join(args[4], args[5]))
        hi = builder.trunc(builder.lshr(r, shift), ir.IntType(64))
        lo = builder.trunc(r, ir.IntType(64))
        return context.make_tuple(builder, signature.return_type, (hi, lo))

    return sig, codegen


@nb.njit(inline="always")
def _next64(s_hi, s_lo, i_hi, i_lo):  # pragma: no cover - compiled
    """One PCG64 step: new state = state * multiplier + increment; XSL-RR output of the new state."""
    s_hi, s_lo = _muladd128(s_hi, s_lo, _MUL_HI, _MUL_LO, i_hi, i_lo)
    x = s_hi ^ s_lo
    rot = s_hi >> np.uint64(58)
    return (x >> rot) | (x << ((np.uint64(64) - rot) & np.uint64(63))), s_hi, s_lo


@nb.njit(inline="always")
def _next32(s_hi, s_lo, i_hi, i_lo, has, spare):  # pragma: no cover - compiled
    """numpy's next_uint32 of PCG64: the buffered high half if there is one, else a new output's
    low half (its high half is buffered). Returns (value, s_hi, s_lo, has, spare)."""
    if has:
        return spare, s_hi, s_lo, _ZERO, spare
    o, s_hi, s_lo = _next64(s_hi, s_lo, i_hi, i_lo)
    return o & _M32, s_hi, s_lo, _ONE, o >> _U32


@nb.njit(inline="always")
def _bounded(excl, reject_below, s_hi, s_lo, i_hi, i_lo, has, spare):  # pragma: no cover - compiled
    """numpy's buffered_bounded_lemire_uint32 for 0..excl-1 (excl = rng + 1 in numpy's terms);
    ``reject_below`` = 2**32 mod excl. Returns (value, s_hi, s_lo, has, spare)."""
    u, s_hi, s_lo, has, spare = _next32(s_hi, s_lo, i_hi, i_lo, has, spare)
    m = u * excl
    if (m & _M32) < excl:
        while (m & _M32) < reject_below:
            u, s_hi, s_lo, has, spare = _next32(s_hi, s_lo, i_hi, i_lo, has, spare)
            m = u * excl
    return m >> _U32, s_hi, s_lo, has, spare


@nb.njit(nogil=True, cache=True)
def bounded_draws(state, high, size):  # pragma: no cover - compiled
    """``Generator.integers(0, high, size=size, dtype=np.uint32)`` of a PCG64 stream, bit for bit.

    ``state`` (6 uint64: state high/low word, increment high/low word, has_uint32, uinteger)
    is advanced in place. 2 <= high < 2**32. Used by the tests against numpy.
    """
    excl = np.uint64(high)
    reject_below = (np.uint64(0xFFFFFFFF) - (excl - _ONE)) % excl
    s_hi, s_lo, i_hi, i_lo, has, spare = state[0], state[1], state[2], state[3], state[4], state[5]
    out = np.empty(size, np.uint32)
    for q in range(size):
        d, s_hi, s_lo, has, spare = _bounded(excl, reject_below, s_hi, s_lo, i_hi, i_lo, has, spare)
        out[q] = np.uint32(d)
    state[0], state[1], state[4], state[5] = s_hi, s_lo, has, spare
    return out


@nb.njit(nogil=True, cache=True)
def permutation_counts(state, n, g_c, g_m, g_skip, focal, v, centre, threshold, count, buf,
                       dup):  # pragma: no cover - compiled
    """Draw one permutation's indices and count its extreme neighbour sums.

    Draws, in order, what ``Generator.integers(0, n - 1, size=n_slots, dtype=np.int32)`` would
    from the PCG64 stream in ``state`` (6 uint64, see :func:`bounded_draws`; advanced in place).
    Slot layout: group g has g_m[g] tested areas (original indices ``focal[t:t + g_m[g]]``, t the
    sum of the earlier g_m) with g_c[g] neighbours each; slot a of its area j is the
    (a * g_m[g] + j)-th draw of the group. Groups with ``g_skip[g]`` are drawn and discarded
    (the caller samples them by Floyd's algorithm). For every other area, the drawn indices into
    the n - 1 other areas are shifted past the focal area; if they are not all distinct, the
    area's position t + j is written to ``dup`` (in increasing order; the caller redraws it),
    else ``count[focal]`` gains 1 when |sum of v over the shifted indices - centre| >= threshold.
    The sum runs over the slots in order a = 0, 1, ... (the floating-point order of the numpy
    path). ``focal`` is uint32. A group's draws go to ``buf`` (uint32, at least max g_c * g_m: a few MB, so they stay
    in cache) and are then read in runs of ``_TILE`` consecutive areas. Returns the number of
    entries written to ``dup``.
    """
    excl = np.uint64(n - 1)
    reject_below = (np.uint64(0xFFFFFFFF) - (excl - _ONE)) % excl
    s_hi, s_lo, i_hi, i_lo, has, spare = state[0], state[1], state[2], state[3], state[4], state[5]
    s = np.empty(_TILE)
    bad = np.empty(_TILE, np.uint8)
    n_dup = 0
    t = 0
    for g in range(g_c.size):
        c = g_c[g]
        m = g_m[g]
        for q in range(c * m):
            d, s_hi, s_lo, has, spare = _bounded(excl, reject_below, s_hi, s_lo, i_hi, i_lo, has, spare)
            buf[q] = np.uint32(d)
        if g_skip[g]:
            t += m
            continue
        tmp = np.empty(c, np.uint32)
        for j0 in range(0, m, _TILE):
            w = min(m - j0, _TILE)
            f = focal[t + j0 : t + j0 + w]
            first = buf[j0 : j0 + w]
            for j in range(w):  # unsigned indices: no negative-index wraparound in the gathers
                d = first[j]
                s[j] = v[np.uint64(d + np.uint32(d >= f[j]))]
                bad[j] = 0
            for a in range(1, c):
                cur = buf[a * m + j0 : a * m + j0 + w]
                for j in range(w):
                    d = cur[j]
                    s[j] += v[np.uint64(d + np.uint32(d >= f[j]))]
            if c <= _PAIRWISE_MAX:
                for a in range(1, c):
                    cur = buf[a * m + j0 : a * m + j0 + w]
                    for b in range(a):
                        other = buf[b * m + j0 : b * m + j0 + w]
                        for j in range(w):
                            bad[j] |= cur[j] == other[j]
            else:  # many neighbours: sort a copy instead of comparing all pairs
                for j in range(w):
                    for a in range(c):
                        tmp[a] = buf[a * m + j0 + j]
                    tmp.sort()
                    for a in range(1, c):
                        if tmp[a] == tmp[a - 1]:
                            bad[j] = 1
                            break
            for j in range(w):
                i = f[j]
                if bad[j]:
                    dup[n_dup] = t + j0 + j
                    n_dup += 1
                elif abs(s[j] - centre[i]) >= threshold[i]:
                    count[i] += 1
        t += m
    state[0], state[1], state[4], state[5] = s_hi, s_lo, has, spare
    return n_dup


def pcg64_state(bit_generator) -> np.ndarray:
    """The state of a numpy PCG64 bit generator as the 6 uint64 the kernels use."""
    d = bit_generator.state
    if d["bit_generator"] != "PCG64":  # pragma: no cover - streams are always PCG64
        raise TypeError("the compiled draws reproduce PCG64 streams only")
    mask = (1 << 64) - 1
    s, inc = d["state"]["state"], d["state"]["inc"]
    return np.array([s >> 64, s & mask, inc >> 64, inc & mask, d["has_uint32"], d["uinteger"]],
                    dtype=np.uint64)


def set_pcg64_state(bit_generator, state: np.ndarray) -> None:
    """Hand a state advanced by the kernels back to the numpy bit generator."""
    bit_generator.state = {
        "bit_generator": "PCG64",
        "state": {"state": (int(state[0]) << 64) | int(state[1]),
                  "inc": (int(state[2]) << 64) | int(state[3])},
        "has_uint32": int(state[4]),
        "uinteger": int(state[5]),
    }
