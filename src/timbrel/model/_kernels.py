"""Elementwise float32 kernels and bulk random draws for the model (numpy only).

Each kernel writes into buffers it is given (in place where ``out`` may alias the
input), so the training step allocates nothing per minibatch.
"""

from __future__ import annotations

import math

import numpy as np

F32 = np.float32

RELU_LINEAR_THRESHOLD = 25.0
"""Copies whose input exceeds this are summed in closed form (softplus(t) = t + 1.4e-11)."""

RELU_WINDOW_COPIES = 40
"""Copies evaluated explicitly below the linear part of the rectified unit's sums.

The neglected copies all have input below ``RELU_LINEAR_THRESHOLD + 1 - RELU_WINDOW_COPIES
= -14``, minus the one-copy margin, i.e. below -15, so their sum is at most
``e^-15 / (1 - e^-1) ≈ 4.9e-7`` per hidden unit, below the 1e-6 target.
"""

#: e^-j for j = 0..36: a factor 1 + e^-(d+j) equals 1 in float64 from j = 37 (e^-37 < 2^-53).
_EXP_STEPS = np.exp(-np.arange(37.0))


def sigmoid(x: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Logistic function into ``out`` (may alias ``x``)."""
    np.negative(x, out=out)
    # exp(-x) overflows to inf for x < -88; 1 / (1 + inf) = 0 is the right limit.
    with np.errstate(over="ignore"):
        np.exp(out, out=out)
    out += 1.0
    np.reciprocal(out, out=out)
    return out


def softplus(x: np.ndarray, out: np.ndarray, tmp: np.ndarray) -> np.ndarray:
    """log(1 + e^x) = max(x, 0) + log1p(e^-|x|) into ``out``, stable for any x."""
    np.abs(x, out=tmp)
    np.negative(tmp, out=tmp)
    np.exp(tmp, out=tmp)
    np.log1p(tmp, out=tmp)
    np.maximum(x, 0.0, out=out)
    out += tmp
    return out


def relu(x: np.ndarray, out: np.ndarray) -> np.ndarray:
    """max(x, 0) into ``out`` (may alias ``x``).

    numpy's maximum against the scalar 0 runs a loop about 2x slower than against a
    row of zeros broadcast over the rows (45 against 24 us per 128 x 1024 float32 pass).
    """
    return np.maximum(x, np.zeros(x.shape[-1], x.dtype), out=out)


def uniform_fill(rng: np.random.Generator, out: np.ndarray) -> np.ndarray:
    """Fill the float32 ``out`` with uniforms on [0, 1) in steps of 2⁻²⁴.

    The very numbers ``rng.random(out=out, dtype=np.float32)`` gives, leaving the
    generator in the same state, in about 60 % of its time: numpy's float32 path calls
    the bit generator once per number (the top 24 bits of a 32-bit draw, each 64-bit
    word giving its low half, then its high half, which the generator keeps for the
    next 32-bit draw); this asks for the raw words in bulk and converts them with two
    passes. The kept half is read from and returned to the generator's state.

    Examples
    --------
    >>> import numpy as np
    >>> a = uniform_fill(np.random.default_rng(0), np.empty(5, np.float32))
    >>> b = np.random.default_rng(0).random(5, dtype=np.float32)
    >>> bool(np.array_equal(a, b))
    True
    """
    if not out.flags.c_contiguous:  # reshape would copy, and the draws would be lost
        out[...] = uniform_fill(rng, np.empty(out.shape, F32))
        return out
    flat = out.reshape(-1)
    n = flat.size
    if n == 0:
        return out
    bits = rng.bit_generator
    state = bits.state
    kept = int(state.get("has_uint32", 0))
    if kept:  # the half the generator kept from its last word comes first
        flat[0] = F32(int(state["uinteger"]) >> 8) * F32(2.0 ** -24)
    fresh = n - kept
    halves = bits.random_raw((fresh + 1) // 2).view(np.uint32)
    if kept or fresh % 2:  # a half was consumed from, or is left to, the generator
        state = dict(bits.state)
        state["has_uint32"] = fresh % 2
        if fresh % 2:
            state["uinteger"] = int(halves[fresh])
        bits.state = state
    used = halves[:fresh]
    np.right_shift(used, 8, out=used)
    rest = flat[kept:]
    rest[...] = used  # integers below 2²⁴ are exact in float32
    rest *= F32(2.0 ** -24)
    return out


def standard_normal(rng: np.random.Generator, out: np.ndarray, scratch: np.ndarray, *,
                    variance: float = 1.0) -> np.ndarray:
    """Fill ``out`` with N(0, variance) float32 draws (Box & Muller 1958) from float32
    uniforms (the variance costs nothing: it scales the radius's square).

    With 24-bit uniforms the radius is at most sqrt(2·24·ln 2) ≈ 5.77, so the tails
    beyond 5.77σ (probability 8e-9) are cut.  ``scratch`` needs at least
    ``out.size // 2`` elements; ``out`` must be C-contiguous.
    """
    flat = out.reshape(-1)
    half = flat.size // 2
    uniform_fill(rng, flat)
    first, second = flat[:half], flat[half:2 * half]
    radius = scratch.reshape(-1)[:half]
    np.subtract(F32(1.0), first, out=radius)  # in (0, 1], so the log is finite
    np.log(radius, out=radius)
    radius *= F32(-2.0 * variance)
    np.sqrt(radius, out=radius)
    second *= F32(2.0 * np.pi)
    np.cos(second, out=first)
    np.sin(second, out=second)
    first *= radius
    second *= radius
    if flat.size % 2:
        flat[-1] = rng.standard_normal(dtype=F32) * F32(math.sqrt(variance))
    return out


def rectified_sum(x: np.ndarray, *, derivative: bool) -> np.ndarray:
    """Σₙ₌₁^∞ softplus(x − n + 0.5) (or its derivative Σₙ sigmoid(x − n + 0.5)) per element.

    Copies with input above ``RELU_LINEAR_THRESHOLD`` are summed in closed form, the
    next ``RELU_WINDOW_COPIES`` explicitly; the rest is below 1e-6 (see the constant).
    """
    shifted = x.astype(F32, copy=True)
    shifted += 0.5
    n_linear = np.floor(shifted - RELU_LINEAR_THRESHOLD)
    np.maximum(n_linear, 0.0, out=n_linear)
    if derivative:
        # each linear copy contributes sigmoid(t) = 1 to within 1.4e-11
        total = n_linear.copy()
    else:
        # Σₙ₌₁ᵏ (x + 0.5 − n) = k (x + 0.5) − k (k + 1) / 2
        total = n_linear * shifted - 0.5 * n_linear * (n_linear + 1.0)
    base = shifted - n_linear
    t = np.empty_like(base)
    term = np.empty_like(base)
    tmp = np.empty_like(base)
    for copy_index in range(1, RELU_WINDOW_COPIES + 1):
        np.subtract(base, copy_index, out=t)
        if derivative:
            sigmoid(t, term)
        else:
            softplus(t, term, tmp)
        total += term
    return total


def stepped_softplus_sum(x: np.ndarray, n_copies: int) -> np.ndarray:
    """Σₖ₌₁ᴷ softplus(x − k + ½) per element, in x's float type, one logarithm in all.

    With s = x + ½ and m = clip(⌊s⌋, 0, K) copies of non-negative input, the sum is
    Σₖ≤ₘ (s − k) + Σⱼ₌₀^{m−1} log1p(e^{−(s−m)−j}) + Σⱼ₌₀^{K−m−1} log1p(e^{−(m+1−s)−j}),
    since softplus(t) = max(t, 0) + log1p(e^{−|t|}).  Each log1p sum is the log of a
    product of factors in (1, 2]; factors with j ≥ 37 equal 1 in float64 (e^{−37} < 2⁻⁵³)
    and are left out.  About twice as fast as K softplus passes.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.array([-3.0, 0.0, 2.5])
    >>> direct = sum(np.logaddexp(0.0, x - k + 0.5) for k in range(1, 5))
    >>> bool(np.allclose(stepped_softplus_sum(x, 4), direct))
    True
    """
    s = x + 0.5
    m = np.clip(np.floor(s), 0, n_copies)
    total = m * s - 0.5 * m * (m + 1)
    n_below = n_copies - m
    for count, distance in ((m, s - m), (n_below, m + 1 - s)):
        n_terms = min(int(count.max(initial=0)), len(_EXP_STEPS))
        if n_terms == 0:
            continue
        base = np.exp(-np.maximum(distance, 0.0))
        product = np.ones_like(x)
        term = np.empty_like(x)
        for j in range(n_terms):
            np.multiply(base, _EXP_STEPS[j], out=term)
            term *= count > j
            term += 1.0
            product *= term
        total += np.log(product)
    return total
