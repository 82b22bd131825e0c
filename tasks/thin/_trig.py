"""Compiled float32 cosine and sine for the random-feature passes.

numpy's float32 ``sin`` and ``cos`` cost about 2 to 3 ns per element each on a CPU without
AVX-512, which made them most of the thin stage's time. The two kernels here compute both
functions of one argument together, in SIMD lanes, from one shared range reduction:

* :func:`cos_sin_sums` adds ``sum_i counts_i cos(theta_ij)`` and
  ``sum_i counts_i sin(theta_ij)`` over the rows ``i`` of a chunk into float32 accumulators
  (the mean-embedding pass; no feature array is ever written);
* :func:`cos_sin_features` turns a feature array whose first half holds ``theta`` into
  ``factor * [cos(theta), sin(theta)]`` in place (features of chosen rows).

Method
------
Cody-Waite range reduction (Cody & Waite 1980, Ch. 8): ``k = round(x 2/pi)``,
``r = x - k pi/2`` with ``pi/2`` split into three float32 parts ``P1 + P2 + P3`` and each
step a fused multiply-add (one rounding, exact product), then minimax polynomials for
``sin r`` and ``cos r`` on ``|r| <= pi/4`` (the coefficients of the Cephes single-precision
``sinf``/``cosf``, Moshier 1989) and the quadrant ``k mod 4`` selecting and signing them.

Why it is accurate: whenever ``k != 0`` (``|x| > pi/4``) both ``x`` and ``k P1`` are
multiples of ``2^-24`` (``P1`` is ``pi/2`` rounded to float32, in [1, 2)) and
``|x - k P1| <= pi/4 + |k| |pi/2 - P1| < 0.9`` for ``|x| <= 2^20``, so the first step is
exact; the later two steps and the polynomials add a few units of ``2^-24`` in absolute
error. Measured against float64 ``numpy.cos``/``numpy.sin`` of the same float32 argument
(``tests/test_thin_trig.py``): at most 3 units of ``2^-24`` (1.8e-7) absolute error for
``|x| <= REDUCTION_LIMIT``.

Arguments beyond :data:`REDUCTION_LIMIT` in magnitude (heavy-tailed frequencies, e.g. the
Laplace kernel's Cauchy draws, can give ``|theta| ~ 1e6``), and NaN or infinite arguments,
never go through the fast path: the SIMD loop gives them zero, counts them per row, and a
second pass over that row alone evaluates them with ``math.cos``/``math.sin`` in float64
(full range reduction by the C library), rounded to float32. NaN or inf in gives NaN out (the
thin stage never passes them: its rows are finite).

The multiply-adds of the range reduction are LLVM's ``llvm.fma`` intrinsic, which is exact
on every target (a library call where the CPU lacks FMA), never a plain multiply and add
that the compiler may or may not fuse. Fast-math is limited to ``contract`` (fusing the
polynomial's Horner steps); no reassociation, so the three-part reduction is kept as written.

Compilation: numba, ``cache=True`` (compiled code is written next to this file under
``__pycache__`` on first use and loaded from there afterwards), ``nogil=True`` so the
mean-embedding pass's worker threads run in parallel. This module imports numba; callers
import it on first use so that ``import winnow.tasks.thin`` does not pay for numba.

References
----------
.. [1] Cody, W. J. and Waite, W. (1980). Software Manual for the Elementary Functions.
   Prentice-Hall. Chapter 8 (sin and cos), additive range reduction.
.. [2] Moshier, S. L. (1989). Methods and Programs for Mathematical Functions. Ellis Horwood.
   Cephes library ``sinf.c``: the single-precision polynomial coefficients used below.
"""

from __future__ import annotations

import math

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.core import cgutils
from numba.extending import intrinsic

__all__ = ["REDUCTION_LIMIT", "cos_sin_features", "cos_sin_sums"]

#: Largest ``|theta|`` taken by the fast path; larger arguments take the exact float64 path.
REDUCTION_LIMIT = 1048576.0  # 2^20

_LIMIT = np.float32(REDUCTION_LIMIT)
_TWO_OVER_PI = np.float32(2.0 / np.pi)
# pi/2 = P1 + P2 + P3 (+ about 1e-22): each part is the float32 rounding of what is left
_P1 = np.float32(np.pi / 2)
_P2 = np.float32(np.pi / 2 - float(_P1))
_P3 = np.float32(np.pi / 2 - float(_P1) - float(_P2))
# Cephes sinf/cosf minimax coefficients on [-pi/4, pi/4] (Moshier 1989, sinf.c)
_S1 = np.float32(-1.6666654611e-1)
_S2 = np.float32(8.3321608736e-3)
_S3 = np.float32(-1.9515295891e-4)
_C1 = np.float32(4.166664568298827e-2)
_C2 = np.float32(-1.388731625493765e-3)
_C3 = np.float32(2.443315711809948e-5)
_ZERO = np.float32(0.0)
_ONE = np.float32(1.0)
_HALF = np.float32(0.5)

# contract only: lets LLVM fuse the polynomial's multiply-adds; no reassociation
_FASTMATH = {"contract"}


@intrinsic
def _fma(typingctx, a, b, c):
    """``a * b + c`` with one rounding (LLVM ``llvm.fma``), float32."""
    sig = types.float32(types.float32, types.float32, types.float32)

    def codegen(context, builder, signature, args):
        f32 = ir.FloatType()
        fnty = ir.FunctionType(f32, [f32, f32, f32])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.fma.f32")
        return builder.call(fn, args)

    return sig, codegen


@njit(fastmath=_FASTMATH, nogil=True, cache=True, inline="always")
def _cos_sin(x):  # pragma: no cover - compiled
    """(cos x, sin x) for ``|x| <= REDUCTION_LIMIT``, float32."""
    k = np.floor(x * _TWO_OVER_PI + _HALF)  # nearest multiple of pi/2
    nk = -k
    r = _fma(nk, _P1, x)  # exact (see module notes)
    r = _fma(nk, _P2, r)
    r = _fma(nk, _P3, r)
    r2 = r * r
    s = r + r * r2 * (_S1 + r2 * (_S2 + r2 * _S3))
    c = _ONE - _HALF * r2 + r2 * r2 * (_C1 + r2 * (_C2 + r2 * _C3))
    q = np.int32(k)  # quadrant: q mod 4 (two's complement: also right for q < 0)
    odd = (q & 1) == 1
    cv = s if odd else c
    sv = c if odd else s
    # cos is negative in quadrants 1 and 2, sin in 2 and 3: multiply by +-1 (5% faster
    # than selecting negated copies)
    return cv * np.float32(1 - ((q + 1) & 2)), sv * np.float32(1 - (q & 2))


@njit(fastmath=_FASTMATH, nogil=True, cache=True, boundscheck=False)
def cos_sin_sums(theta, counts, cos_sum, sin_sum):  # pragma: no cover - compiled
    """Add the count-weighted column sums of ``cos(theta)`` and ``sin(theta)``.

    Parameters
    ----------
    theta : ndarray of float32, shape (n, D), C-contiguous
    counts : ndarray of float32, shape (n,)
    cos_sum, sin_sum : ndarray of float32, shape (D,)
        Accumulators, updated in place: ``cos_sum[j] += sum_i counts[i] cos(theta[i, j])``,
        rows added in order (float32, like the BLAS product it replaces).

    Returns
    -------
    int
        Number of arguments that took the exact float64 path (``|theta| > REDUCTION_LIMIT``
        or not finite).
    """
    n, width = theta.shape
    n_exact = 0
    for i in range(n):
        w = counts[i]
        row = theta[i]
        any_big = False  # a boolean OR keeps the loop 8 lanes wide (a counter halves it)
        for j in range(width):
            x = row[j]
            big = not (abs(x) <= _LIMIT)  # NaN counts as big too
            any_big |= big
            cv, sv = _cos_sin(_ZERO if big else x)  # keep the reduction's k in range
            cos_sum[j] += w * (_ZERO if big else cv)
            sin_sum[j] += w * (_ZERO if big else sv)
        if any_big:
            for j in range(width):
                x = row[j]
                if not (abs(x) <= _LIMIT):
                    n_exact += 1
                    x64 = np.float64(x)
                    cos_sum[j] += w * np.float32(math.cos(x64))
                    sin_sum[j] += w * np.float32(math.sin(x64))
    return n_exact


@njit(fastmath=_FASTMATH, nogil=True, cache=True, boundscheck=False)
def cos_sin_features(out, n_freq, factor):  # pragma: no cover - compiled
    """Turn ``out[:, :n_freq] = theta`` into ``factor * [cos theta, sin theta]`` in place.

    Parameters
    ----------
    out : ndarray of float32, shape (n, 2 n_freq), C-contiguous
        On entry the first ``n_freq`` columns hold ``theta``; on exit they hold
        ``factor * cos(theta)`` and the last ``n_freq`` columns ``factor * sin(theta)``.
    n_freq : int
    factor : float32
        Scale in (0, 1] applied to every value (1 for none; multiplying by 1 is exact).
        At most 1 so that a finished value can never be mistaken for a pending argument.

    Returns
    -------
    int
        Number of arguments that took the exact float64 path.
    """
    n = out.shape[0]
    n_exact = 0
    for i in range(n):
        row = out[i]
        head = row[:n_freq]
        tail = row[n_freq:]
        any_big = False
        for j in range(n_freq):
            x = head[j]
            big = not (abs(x) <= _LIMIT)
            any_big |= big
            cv, sv = _cos_sin(_ZERO if big else x)
            # exact-path arguments keep theta in the head until the second pass below
            head[j] = x if big else factor * cv
            tail[j] = factor * sv
        if any_big:
            for j in range(n_freq):
                x = head[j]
                if not (abs(x) <= _LIMIT):
                    n_exact += 1
                    x64 = np.float64(x)
                    head[j] = factor * np.float32(math.cos(x64))
                    tail[j] = factor * np.float32(math.sin(x64))
    return n_exact
