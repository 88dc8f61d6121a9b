"""Arithmetic of a raw feature block: moments, centred cross-products, materialised values.

A linear pass touches every stored byte once, so turning int8 or float32 into a centred float64 block and
then multiplying it costs several times more memory traffic than decoding the chunk. These routines work
from the raw block instead:

* `moments`: per-feature missing count, observed mean, centred sum of squares. For int8 the sums are
  integer, so the mean is correctly rounded and the centred sum of squares exact
  ((n_obs * sum x^2 - (sum x)^2) / n_obs).
* `cross`: ``lhs_t @ values`` where ``values`` is the imputed, centred float64 block that is never
  written out: each raw value is converted, centred (missing -> 0) and multiplied while in registers.
* `centre_into`: the values themselves, for kernels that need them and for the top-k columns.

numba is optional (it is not a dependency of the package). When it imports, the loops below are compiled;
otherwise, or with the environment variable ``WIDESCREEN_NUMBA=0``, numpy versions give the same results
up to rounding of the float sums (int8 moments are exact either way).
"""

from __future__ import annotations

import os

import numpy as np

from ._format import MISSING_INT8

#: Above this many rows of ``lhs_t`` the cross-products go through BLAS on cache-sized tiles instead of
#: the fused loop, whose cost grows with every extra response.
FUSED_MAX_ROWS = 8
#: Columns per tile of the tiled routes: n x 128 float64 stays in a core's L2 cache for n up to ~2000.
TILE = 128


def _numba_wanted() -> bool:
    return os.environ.get("WIDESCREEN_NUMBA", "1").strip().lower() not in (
        "0",
        "false",
        "no",
        "off",
    )


try:  # pragma: no cover - exercised when numba is installed
    if not _numba_wanted():
        raise ImportError("disabled by WIDESCREEN_NUMBA")
    import numba

    def _jit(f):
        return numba.njit(nogil=True, cache=True, boundscheck=False)(f)

    HAVE_NUMBA = True
except ImportError:
    HAVE_NUMBA = False

    def _jit(f):
        return f


#: Whether the compiled loops are used; tests switch it off to check the numpy route.
use_numba = HAVE_NUMBA

# Rows accumulated in int16 before spilling to int64; 128 * 11^2 and 128 * 127 both fit in int16.
_SPILL = 128
_SMALL = 11


@_jit
def _moments_i8_small(raw, n_miss, s1, s2):  # pragma: no cover - compiled
    # int16 partial sums are exact while every |value| <= 11 (dosages); the largest |value| seen is
    # returned so the caller can redo the block with the wide version otherwise.
    n, w = raw.shape
    p0 = np.zeros(w, np.int16)
    p1 = np.zeros(w, np.int16)
    p2 = np.zeros(w, np.int16)
    hi = np.zeros(w, np.int16)
    n_miss[:] = 0
    s1[:] = 0
    s2[:] = 0
    for i0 in range(0, n, _SPILL):
        for i in range(i0, min(i0 + _SPILL, n)):
            for j in range(w):
                v = np.int16(raw[i, j])
                miss = v == MISSING_INT8
                v = np.int16(0) if miss else v
                p0[j] += miss
                p1[j] += v
                p2[j] += v * v
                hi[j] = max(hi[j], abs(v))
        for j in range(w):
            n_miss[j] += p0[j]
            s1[j] += p1[j]
            s2[j] += p2[j]
            p0[j] = 0
            p1[j] = 0
            p2[j] = 0
    return hi.max()


@_jit
def _moments_i8_wide(raw, n_miss, s1, s2):  # pragma: no cover - compiled
    n, w = raw.shape
    n_miss[:] = 0
    s1[:] = 0
    s2[:] = 0
    for i in range(n):
        for j in range(w):
            v = np.int64(raw[i, j])
            miss = v == MISSING_INT8
            v = 0 if miss else v
            n_miss[j] += miss
            s1[j] += v
            s2[j] += v * v


@_jit
def _moments_float(raw, n_obs, mean, sumsq):  # pragma: no cover - compiled
    # Two passes (mean, then centred squares) so that offset data (x = 1e8 + noise) keep their
    # precision. Counts are kept in float64 so that every accumulator has the same vector width.
    n, w = raw.shape
    cnt = np.zeros(w)
    mean[:] = 0.0
    sumsq[:] = 0.0
    for i in range(n):
        r = raw[i]
        for j in range(w):
            v = np.float64(r[j])
            ok = v == v
            cnt[j] += 1.0 if ok else 0.0
            mean[j] += v if ok else 0.0
    for j in range(w):
        mean[j] = mean[j] / cnt[j] if cnt[j] > 0 else 0.0
        n_obs[j] = np.int64(cnt[j])
    for i in range(n):
        r = raw[i]
        for j in range(w):
            v = np.float64(r[j])
            d = v - mean[j] if v == v else 0.0
            sumsq[j] += d * d


@_jit
def _cross_i8(raw, mean, lhs_t, out, any_missing):  # pragma: no cover - compiled
    # Four rows at a time: a quarter of the loads and stores of the accumulator row, which is what
    # bounds the one-row loop. Without missing values sum_r c_r (x_r - mean) is formed as
    # sum_r c_r x_r - (sum_r c_r) mean: exact conversions of small integers, one rounding per product.
    n, w = raw.shape
    m = lhs_t.shape[0]
    out[:, :] = 0.0
    i = 0
    while i + 4 <= n:
        r0 = raw[i]
        r1 = raw[i + 1]
        r2 = raw[i + 2]
        r3 = raw[i + 3]
        for k in range(m):
            c0 = lhs_t[k, i]
            c1 = lhs_t[k, i + 1]
            c2 = lhs_t[k, i + 2]
            c3 = lhs_t[k, i + 3]
            o = out[k]
            if any_missing:
                for j in range(w):
                    mu = mean[j]
                    v0 = r0[j]
                    v1 = r1[j]
                    v2 = r2[j]
                    v3 = r3[j]
                    d0 = 0.0 if v0 == MISSING_INT8 else np.float64(v0) - mu
                    d1 = 0.0 if v1 == MISSING_INT8 else np.float64(v1) - mu
                    d2 = 0.0 if v2 == MISSING_INT8 else np.float64(v2) - mu
                    d3 = 0.0 if v3 == MISSING_INT8 else np.float64(v3) - mu
                    o[j] += (c0 * d0 + c1 * d1) + (c2 * d2 + c3 * d3)
            else:
                cs = (c0 + c1) + (c2 + c3)
                for j in range(w):
                    a = c0 * np.float64(r0[j]) + c1 * np.float64(r1[j])
                    b = c2 * np.float64(r2[j]) + c3 * np.float64(r3[j])
                    o[j] += (a + b) - cs * mean[j]
        i += 4
    while i < n:
        r0 = raw[i]
        for k in range(m):
            c0 = lhs_t[k, i]
            o = out[k]
            for j in range(w):
                v0 = r0[j]
                o[j] += 0.0 if v0 == MISSING_INT8 else c0 * (np.float64(v0) - mean[j])
        i += 1


@_jit
def _cross_float(raw, mean, lhs_t, out):  # pragma: no cover - compiled
    n, w = raw.shape
    m = lhs_t.shape[0]
    out[:, :] = 0.0
    i = 0
    while i + 4 <= n:
        r0 = raw[i]
        r1 = raw[i + 1]
        r2 = raw[i + 2]
        r3 = raw[i + 3]
        for k in range(m):
            c0 = lhs_t[k, i]
            c1 = lhs_t[k, i + 1]
            c2 = lhs_t[k, i + 2]
            c3 = lhs_t[k, i + 3]
            o = out[k]
            for j in range(w):
                mu = mean[j]
                v0 = np.float64(r0[j])
                v1 = np.float64(r1[j])
                v2 = np.float64(r2[j])
                v3 = np.float64(r3[j])
                d0 = v0 - mu if v0 == v0 else 0.0
                d1 = v1 - mu if v1 == v1 else 0.0
                d2 = v2 - mu if v2 == v2 else 0.0
                d3 = v3 - mu if v3 == v3 else 0.0
                o[j] += (c0 * d0 + c1 * d1) + (c2 * d2 + c3 * d3)
        i += 4
    while i < n:
        r0 = raw[i]
        for k in range(m):
            c0 = lhs_t[k, i]
            o = out[k]
            for j in range(w):
                v0 = np.float64(r0[j])
                o[j] += c0 * (v0 - mean[j]) if v0 == v0 else 0.0
        i += 1


@_jit
def _centre_i8(raw, mean, out):  # pragma: no cover - compiled
    n, w = raw.shape
    for i in range(n):
        for j in range(w):
            v = raw[i, j]
            out[i, j] = 0.0 if v == MISSING_INT8 else np.float64(v) - mean[j]


@_jit
def _centre_float(raw, mean, out):  # pragma: no cover - compiled
    n, w = raw.shape
    for i in range(n):
        for j in range(w):
            v = np.float64(raw[i, j])
            out[i, j] = v - mean[j] if v == v else 0.0


# --------------------------------------------------------------------------------------------
# numpy versions


def _moments_i8_numpy(raw: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    s1 = raw.sum(axis=0, dtype=np.int64)
    wide = raw.astype(np.int32)
    wide *= wide
    s2 = wide.sum(axis=0, dtype=np.int64)
    if raw.min(initial=0) == MISSING_INT8:
        n_miss = np.count_nonzero(raw == MISSING_INT8, axis=0).astype(np.int64)
        s1 -= MISSING_INT8 * n_miss
        s2 -= MISSING_INT8 * MISSING_INT8 * n_miss
    else:
        n_miss = np.zeros(raw.shape[1], np.int64)
    return n_miss, s1, s2


def _centre_numpy(raw: np.ndarray, mean: np.ndarray, out: np.ndarray) -> None:
    np.copyto(out, raw, casting="unsafe")
    if raw.dtype == np.int8:
        mask = raw == MISSING_INT8 if raw.min(initial=0) == MISSING_INT8 else None
    else:
        mask = np.isnan(out)
        mask = mask if mask.any() else None
    out -= mean
    if mask is not None:
        out[mask] = 0.0


# --------------------------------------------------------------------------------------------
# The public routines


def moments(
    raw: np.ndarray, values_out: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, bool]:
    """Missing count, observed mean and centred sum of squares of every column.

    Parameters
    ----------
    raw : ndarray of shape (n, width), int8 (sentinel -128) or float32 / float64 (NaN)
    values_out : ndarray of shape (n, width), float64, optional
        Where the numpy route for floats may leave the centred values it computes on the way.

    Returns
    -------
    n_missing : ndarray of shape (width,), int64
    mean : ndarray of shape (width,), float64
        0 for a column with no observed value.
    sumsq : ndarray of shape (width,), float64
        Sum over observed samples of (x - mean)^2.
    exact_zero : ndarray of shape (width,), bool
        int8 only: the centred sum of squares is exactly 0 (no variation); all False for floats.
    filled : bool
        Whether ``values_out`` now holds the imputed, centred values.
    """
    n, w = raw.shape
    if raw.dtype == np.int8:
        if use_numba:
            n_miss = np.empty(w, np.int64)
            s1 = np.empty(w, np.int64)
            s2 = np.empty(w, np.int64)
            if w and _moments_i8_small(raw, n_miss, s1, s2) > _SMALL:
                _moments_i8_wide(raw, n_miss, s1, s2)
        else:
            n_miss, s1, s2 = _moments_i8_numpy(raw)
        n_obs = n - n_miss
        safe = np.maximum(n_obs, 1)
        mean = s1 / safe
        # Exact in int64: |values| <= 127, so n_obs * s2 stays far below 2^63 for any realistic n.
        num = n_obs * s2 - s1 * s1
        return n_miss, mean, num / safe, num == 0, False
    if use_numba:
        n_obs = np.empty(w, np.int64)
        mean = np.empty(w, np.float64)
        sumsq = np.empty(w, np.float64)
        _moments_float(raw, n_obs, mean, sumsq)
        return n - n_obs, mean, sumsq, np.zeros(w, bool), False
    x = values_out if values_out is not None else np.empty((n, w), np.float64)
    np.copyto(x, raw, casting="unsafe")
    mask = np.isnan(x)
    n_miss = np.count_nonzero(mask, axis=0).astype(np.int64)
    any_missing = bool(n_miss.any())
    if any_missing:
        x[mask] = 0.0
    n_obs = n - n_miss
    mean = np.where(n_obs > 0, x.sum(axis=0) / np.maximum(n_obs, 1), 0.0)
    x -= mean
    if any_missing:
        x[mask] = 0.0
    sumsq = np.einsum("ij,ij->j", x, x)
    return n_miss, mean, sumsq, np.zeros(w, bool), values_out is not None


def centre_into(raw: np.ndarray, mean: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Write the imputed, centred float64 values of ``raw`` into ``out`` (shape (n, width)) and return it."""
    if use_numba:
        (_centre_i8 if raw.dtype == np.int8 else _centre_float)(raw, mean, out)
    else:
        _centre_numpy(raw, mean, out)
    return out


def cross(
    raw: np.ndarray, mean: np.ndarray, lhs_t: np.ndarray, any_missing: bool, scratch: np.ndarray
) -> np.ndarray:
    """``lhs_t @ values`` without writing out the float64 values.

    Parameters
    ----------
    raw : ndarray of shape (n, width)
    mean : ndarray of shape (width,)
    lhs_t : ndarray of shape (m, n), float64, C-contiguous
    any_missing : bool
        Whether any value of ``raw`` is missing (lets int8 blocks skip the sentinel test).
    scratch : ndarray of shape (n, TILE), float64
        Tile buffer of the tiled route.

    Returns
    -------
    ndarray of shape (m, width), float64
    """
    m = lhs_t.shape[0]
    w = raw.shape[1]
    out = np.empty((m, w), np.float64)
    if use_numba and m <= FUSED_MAX_ROWS:
        if raw.dtype == np.int8:
            _cross_i8(raw, mean, lhs_t, out, any_missing)
        else:
            _cross_float(raw, mean, lhs_t, out)
        return out
    # Cache-sized tiles of values, each multiplied by BLAS while it is still in L2.
    n, t = scratch.shape
    flat = scratch.reshape(-1)
    for a in range(0, w, t):
        b = min(a + t, w)
        tile = flat[: n * (b - a)].reshape(n, b - a)  # C-contiguous, so the loops vectorise
        centre_into(raw[:, a:b], mean[a:b], tile)
        out[:, a:b] = lhs_t @ tile
    return out


@_jit
def _count_invalid_u8(flat):  # pragma: no cover - compiled
    # As unsigned bytes the valid dosages are 0, 1, 2 and 128 (the int8 sentinel -128).
    bad = 0
    for i in range(flat.size):
        v = flat[i]
        bad += (v > 2) & (v != 128)
    return bad


def count_invalid_dosages(values: np.ndarray) -> int:
    """How many int8 values are not 0, 1, 2 or the missing sentinel (a damaged dosage chunk).

    Parameters
    ----------
    values : ndarray of int8, C-contiguous rows (a decoded chunk)
    """
    u8 = np.ascontiguousarray(values).reshape(-1).view(np.uint8)
    if use_numba:
        return int(_count_invalid_u8(u8))
    return int(np.count_nonzero((u8 > 2) & (u8 != 128)))
