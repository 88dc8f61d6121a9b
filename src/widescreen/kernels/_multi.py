"""Statistics of many responses in one pass: a response matrix of width K, each with its own samples.

A response matrix ``Y`` of shape (n, K) holds NaN where a sample is not part of response k (a trait's
missing value, a sample outside a half-sample or a training fold); covariates are shared. Every
statistic of response k equals what a one-response pass over the samples of response k alone gives (to
rounding): the feature's missing values are imputed by its mean over those samples, its sum of squares
and its covariate adjustment are taken over them.

The block's values ``v`` are centred on the mean over all analysed samples (missing -> 0). For the
samples ``S_k`` of response k (0/1 weights ``m_k``) the feature's own mean differs from it by
``d_k = m_k' v / n_obs_k``, where ``n_obs_k = n_k - m_k' M`` and ``M`` is the block's missing-value
indicator; the feature as the one-response pass sees it is ``v - d_k`` on the observed samples of
``S_k`` and 0 on the missing ones. Every quantity of the test is then a product of the block with a
column built once per pass, corrected by ``d_k`` times the same column's product with ``M`` (zero when
nothing is missing):

- linear: ``X' [m_k r_k | m_g | Q_g]`` and ``(v * v)' m_g``, with ``r_k`` the response residualised on
  ``S_k`` and unit-normed, ``Q_g`` an orthonormal basis of the centred covariates on the samples of
  mask ``g`` (responses with the same samples share ``m_g`` and ``Q_g``);
- logistic and Poisson score test: ``X' [m_k (y_k - mu0_k) | m_k | G_k | D_k V_k]`` and
  ``(v * v)' [w0_k | V_k | m_k]`` from each response's null fit on its own samples (`_glm_state`).

One (or two) BLAS products per block serve all K responses; no loop over responses or features runs in
the block task. The exact per-feature likelihood fits of the GLM and Cox families stay one response at a
time (they are iterative per feature and response).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import special

from ..store import MISSING_INT8, Block, _accel
from ._glm_state import as_covariates, prepare_glm
from ._linear import _orthonormal_basis


def response_masks(Y: np.ndarray, name: str = "Y") -> np.ndarray:
    """The (n, K) boolean mask of the samples of each response (finite entries of ``Y``)."""
    mask = np.isfinite(Y)
    bad = np.flatnonzero(~mask & ~np.isnan(Y))
    if bad.size:
        i, k = np.unravel_index(bad[0], Y.shape)
        raise ValueError(f"{name}[{i}, {k}] is infinite; use NaN to leave a sample out")
    return mask


def _as_matrix(Y) -> np.ndarray:
    Y = np.asarray(Y, dtype=np.float64)
    if Y.ndim == 1:
        Y = Y[:, None]
    if Y.ndim != 2 or Y.shape[1] < 1:
        raise ValueError(f"the response matrix must have shape (n, K) with K >= 1; got {Y.shape}")
    return Y


def _mask_groups(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distinct sample masks (n, G) and each response's group (K,)."""
    packed = np.packbits(mask, axis=0)
    _, first, group = np.unique(packed.T, axis=0, return_index=True, return_inverse=True)
    return mask[:, first], np.asarray(group, dtype=np.intp).ravel()


def missing_indicator(block: Block) -> tuple[np.ndarray, np.ndarray] | None:
    """(columns with a missing value, their (n, c) float64 missing indicator), or None."""
    if not block.any_missing:
        return None
    cols = np.flatnonzero(block.n_missing)
    raw = np.take(block.raw, cols, axis=1)
    miss = raw == MISSING_INT8 if raw.dtype == np.int8 else np.isnan(raw)
    return cols, miss.astype(np.float64)


def _with_missing(block: Block, lhs_t: np.ndarray, cross: np.ndarray) -> np.ndarray:
    """``lhs_t @ M`` (zero where no value is missing), shape of ``cross``."""
    out = np.zeros_like(cross)
    got = missing_indicator(block)
    if got is not None:
        cols, miss = got
        out[:, cols] = lhs_t @ miss
    return out


def _squares(block: Block, lhs_t: np.ndarray) -> np.ndarray:
    """``lhs_t @ (v * v)`` for the block's centred values ``v``."""
    v = block.values
    return lhs_t @ (v * v)


# --------------------------------------------------------------------------------------------
# Sums over each mask's samples of an int8 block, from lists of samples


#: A gathered row of an int8 block costs about this many samples of one mask's float32 product, and
#: building the product's float32 operand about as much as ``_PRODUCT_BUILD`` masks (measured per 1024
#: features, n = 2000, one core: 0.1 us a gathered row; the product 6 ms + 0.025 ms a mask).
_GATHER_COST = 8.0
_PRODUCT_BUILD = 240


@dataclass(frozen=True)
class MaskRows:
    """The samples of each mask as a list: its own samples, or (``complement``) those it leaves out,
    whichever is shorter; the sums of a complement mask are the block's totals minus theirs.

    Attributes
    ----------
    rows : ndarray of intp
        The lists of every mask, one after the other.
    offsets : ndarray of intp of shape (G + 1,)
        Mask g's list is ``rows[offsets[g]:offsets[g + 1]]``.
    complement : ndarray of bool of shape (G,)
    """

    rows: np.ndarray
    offsets: np.ndarray
    complement: np.ndarray

    @classmethod
    def of(cls, mask: np.ndarray) -> MaskRows | None:
        """The lists of the (n, G) boolean masks, or None when the float32 product of the masks is
        cheaper (hundreds of masks that each leave out many samples) or numba is off."""
        if not _accel.use_numba:
            return None
        n, G = mask.shape
        n_in = mask.sum(axis=0)
        complement = n - n_in < n_in
        rows = [np.flatnonzero(~mask[:, g] if c else mask[:, g]) for g, c in enumerate(complement)]
        cost = sum(r.size for r in rows) + (n if complement.any() else 0)
        if _GATHER_COST * cost > (G + _PRODUCT_BUILD) * n:
            return None
        offsets = np.concatenate([[0], np.cumsum([r.size for r in rows])]).astype(np.intp)
        return cls(np.concatenate(rows).astype(np.intp), offsets, complement)


@_accel._jit
def _add_rows(raw, rows, a0, a1, a2):  # pragma: no cover - compiled
    # Missing count, sum and sum of squares of the listed rows; exact in int32 (|x| <= 127).
    w = raw.shape[1]
    for r in rows:
        for j in range(w):
            v = np.int32(raw[r, j])
            m = v == MISSING_INT8
            v = np.int32(0) if m else v
            a0[j] += m
            a1[j] += v
            a2[j] += v * v


@_accel._jit
def _gathered_sums_loop(raw, rows, offsets, complement, s0, s1, s2):  # pragma: no cover - compiled
    n, w = raw.shape
    t0, t1, t2 = np.zeros(w, np.int32), np.zeros(w, np.int32), np.zeros(w, np.int32)
    a0, a1, a2 = np.zeros(w, np.int32), np.zeros(w, np.int32), np.zeros(w, np.int32)
    if complement.any():
        _add_rows(raw, np.arange(n), t0, t1, t2)
    for g in range(offsets.size - 1):
        a0[:] = 0
        a1[:] = 0
        a2[:] = 0
        _add_rows(raw, rows[offsets[g] : offsets[g + 1]], a0, a1, a2)
        if complement[g]:
            for j in range(w):
                s0[g, j] = t0[j] - a0[j]
                s1[g, j] = t1[j] - a1[j]
                s2[g, j] = t2[j] - a2[j]
        else:
            for j in range(w):
                s0[g, j] = a0[j]
                s1[g, j] = a1[j]
                s2[g, j] = a2[j]


@dataclass(frozen=True)
class CovariateLists:
    """Each mask's basis products from q0 shared rows and lists of samples.

    With ``zs`` the covariates centred over all samples and scaled to unit norm, mask g's basis is
    ``Q_g = diag(m_g) (zs - 1 mu_g') C_g`` (``mu_g`` the mean of ``zs`` over its samples). For a
    feature ``u`` centred on the mask's own samples (so ``m_g' u = 0``), ``Q_g' u = C_g' zs' diag(m_g) u``,
    and ``zs' diag(m_g) u`` is the shared product ``zs' v`` less the sum over the samples the mask
    leaves out (or the sum over its own, whichever list is shorter), corrected for the shift of the
    feature's mean: q0 rows of the product instead of G q, and ``sum |list|`` samples gathered.

    Attributes
    ----------
    zs : ndarray of shape (n, q0), C-contiguous
    zsum : ndarray of shape (G, q0)
        ``m_g' zs``.
    coef : ndarray of shape (G, q0, q)
        ``C_g``, by least squares (the basis lies in the span of the centred covariates).
    """

    zs: np.ndarray
    zsum: np.ndarray
    coef: np.ndarray

    @classmethod
    def of(cls, Z, groups: np.ndarray, basis: np.ndarray, lists: MaskRows | None):
        if lists is None or Z is None or Z.shape[1] == 0 or basis.shape[2] == 0:
            return None
        zc = Z - Z.mean(axis=0)
        norm = np.linalg.norm(zc, axis=0)
        zs = np.ascontiguousarray(zc / np.where(norm > 0, norm, 1.0))
        G, q0, q = groups.shape[1], zs.shape[1], basis.shape[2]
        zsum = groups.T @ zs
        coef = np.zeros((G, q0, q))
        for g in range(G):  # once per pass
            rows = np.flatnonzero(groups[:, g])
            zg = zs[rows] - zs[rows].mean(axis=0)
            coef[g] = np.linalg.lstsq(zg, basis[g][rows], rcond=None)[0]
        return cls(zs, zsum, coef)


@_accel._jit
def _gathered_cov_loop(raw, mean, zs, rows, offsets, lv, lm):  # pragma: no cover - compiled
    # Per mask: sum over its listed samples of zs_i v_i and zs_i M_i (v: values centred on the mean
    # over all samples, 0 where missing; M: the missing indicator, added where it is 1).
    w, q0 = raw.shape[1], zs.shape[1]
    vv = np.empty(w)
    for g in range(offsets.size - 1):
        for idx in range(offsets[g], offsets[g + 1]):
            i = rows[idx]
            n_miss = 0
            for j in range(w):
                x = raw[i, j]
                miss = x == MISSING_INT8
                n_miss += miss
                vv[j] = 0.0 if miss else x - mean[j]
            for c in range(q0):
                z = zs[i, c]
                for j in range(w):
                    lv[g, c, j] += z * vv[j]
            if n_miss:
                for j in range(w):
                    if raw[i, j] == MISSING_INT8:
                        for c in range(q0):
                            lm[g, c, j] += zs[i, c]


def _basis_products(block: Block, state: MultiLinearState, P, ML, d, K: int) -> np.ndarray:
    """``Q_g' u_g`` (G, q, w) for each mask's centred feature, from the shared rows ``P[K:]``,
    ``ML[K:]`` and the lists of samples (`CovariateLists`)."""
    cl, lists = state.cov_lists, state.gather
    G, q0 = cl.zsum.shape
    lv, lm = np.zeros((G, q0, block.width)), np.zeros((G, q0, block.width))
    _gathered_cov_loop(block.raw, block.mean, cl.zs, lists.rows, lists.offsets, lv, lm)
    comp = lists.complement[:, None, None]
    a = np.where(comp, P[None, K:] - lv, lv)  # zs' diag(m_g) v
    am = np.where(comp, ML[None, K:] - lm, lm)  # zs' diag(m_g) M
    # u = v - d on the mask's observed samples: zs' diag(m_g) u = a - d (zsum - am)
    wg = a - d[:, None, :] * (cl.zsum[:, :, None] - am)
    return np.matmul(cl.coef.transpose(0, 2, 1), wg)


def _gathered_sums(raw: np.ndarray, lists: MaskRows):
    """Per mask, the sums of x, of x^2 and of the missing indicator over its samples (int8 block),
    exact integers: the same values as the masks' float32 product."""
    G, w = lists.complement.size, raw.shape[1]
    s0, s1, s2 = np.empty((G, w)), np.empty((G, w)), np.empty((G, w))
    _gathered_sums_loop(raw, lists.rows, lists.offsets, lists.complement, s0, s1, s2)
    return s1, s2, s0


# --------------------------------------------------------------------------------------------
# Linear family


@dataclass(frozen=True)
class MultiLinearState:
    """Response state of a linear pass over K responses.

    Attributes
    ----------
    r : ndarray of shape (n, K)
        Each response residualised on the intercept and covariates over its own samples, unit-normed,
        0 outside its samples.
    groups : ndarray of shape (n, G)
        The distinct sample masks (float 0/1).
    group : ndarray of int of shape (K,)
        Each response's mask.
    basis : ndarray of shape (G, n, q)
        Per mask, an orthonormal basis of the centred covariates on its samples (0 elsewhere; columns
        beyond its rank are 0).
    n_obs : ndarray of shape (G,)
        Samples per mask.
    df : ndarray of int of shape (K,)
        Residual degrees of freedom of each response's t statistic.
    lhs_t : ndarray of shape (K + G + G q, n)
        ``[r, groups, basis]`` transposed: the left factor of the block's one product.
    """

    r: np.ndarray
    groups: np.ndarray
    group: np.ndarray
    basis: np.ndarray
    n_obs: np.ndarray
    df: np.ndarray
    #: The covariates (n, q0) the bases were built from (optional: they let masks given as lists of
    #: samples replace the G q basis rows of the product by q0 shared rows, `CovariateLists`).
    covariates: np.ndarray | None = field(default=None, repr=False, compare=False)
    lhs_t: np.ndarray = field(default=None, repr=False, compare=False)  # type: ignore[assignment]

    #: ``[r, basis]`` transposed: the float64 rows of the int8 route (`_int8_mask_sums` does the masks).
    resp_t: np.ndarray = field(default=None, repr=False, compare=False)  # type: ignore[assignment]
    #: The masks as float32 (G, n), for their exact integer sums over int8 blocks.
    masks32: np.ndarray = field(default=None, repr=False, compare=False)  # type: ignore[assignment]
    #: The masks as lists of samples for `_gathered_sums` (None: the float32 product is cheaper).
    gather: MaskRows | None = field(default=None, repr=False, compare=False)

    def __post_init__(self) -> None:
        if self.lhs_t is None:
            G, n, q = self.basis.shape
            parts = [self.r.T, self.groups.T, self.basis.transpose(0, 2, 1).reshape(G * q, n)]
            object.__setattr__(self, "lhs_t", np.ascontiguousarray(np.vstack(parts)))
            resp = np.vstack([parts[0], parts[2]])
            object.__setattr__(self, "resp_t", np.ascontiguousarray(resp))
            object.__setattr__(self, "masks32", np.ascontiguousarray(self.groups.T, np.float32))
            object.__setattr__(self, "gather", MaskRows.of(self.groups > 0))
            lists = CovariateLists.of(self.covariates, self.groups, self.basis, self.gather)
            object.__setattr__(self, "cov_lists", lists)
            if lists is not None:
                rows = np.ascontiguousarray(np.vstack([parts[0], lists.zs.T]))
                object.__setattr__(self, "resp_lists_t", rows)

    #: The covariates' share of the products from lists of samples (None: the basis rows are used).
    cov_lists: CovariateLists | None = field(default=None, repr=False, compare=False)
    #: ``[r, zs]`` transposed: the float64 rows of the product when ``cov_lists`` is set.
    resp_lists_t: np.ndarray | None = field(default=None, repr=False, compare=False)

    @property
    def n_responses(self) -> int:
        return self.r.shape[1]

    @property
    def n_nulls(self) -> int:
        return 0


def prepare_linear_multi(Y, covariates: np.ndarray | None = None) -> MultiLinearState:
    """Build the state of a linear pass over the responses of ``Y`` (NaN: sample not in response k).

    Parameters
    ----------
    Y : ndarray of shape (n, K)
    covariates : ndarray of shape (n, q), optional
        Shared by every response; each response is adjusted on its own samples.

    Raises
    ------
    ValueError
        A response with too few samples, or no variation left after the covariates (naming it).
    """
    Y = _as_matrix(Y)
    n = Y.shape[0]
    mask = response_masks(Y)
    Z = as_covariates(covariates, n)
    groups, group = _mask_groups(mask)
    G = groups.shape[1]
    bases = []
    for g in range(G):  # once per pass, per distinct set of samples
        rows = np.flatnonzero(groups[:, g])
        bases.append((rows, _orthonormal_basis(Z[rows])))
    q = max((b.shape[1] for _, b in bases), default=0)
    basis = np.zeros((G, n, q))
    rank = np.zeros(G, dtype=np.int64)
    for g, (rows, b) in enumerate(bases):
        basis[g][np.ix_(rows, np.arange(b.shape[1]))] = b
        rank[g] = b.shape[1]
    n_obs = groups.sum(axis=0).astype(np.float64)
    df = (n_obs[group] - 1 - rank[group] - 1).astype(np.int64)
    if (df < 1).any():
        k = int(np.flatnonzero(df < 1)[0])
        raise ValueError(
            f"response {k} has too few samples ({int(n_obs[group[k]])}) for "
            f"{int(rank[group[k]])} adjustment columns"
        )
    Yz = np.where(mask, Y, 0.0)
    means = Yz.sum(axis=0) / n_obs[group]
    r = np.where(mask, Y - means, 0.0)
    if q:
        B = basis[group]  # (K, n, q)
        r = r - np.einsum("kiq,kq->ik", B, np.einsum("kiq,ik->kq", B, r))
    norms = np.linalg.norm(r, axis=0)
    scale = np.maximum(np.linalg.norm(Yz, axis=0), 1.0)
    flat = np.flatnonzero(norms <= 1e-12 * scale)
    if flat.size:
        raise ValueError(
            f"response {int(flat[0])} has no variation left after removing the intercept and "
            "covariates"
        )
    return MultiLinearState(
        r=r / norms,
        groups=groups.astype(np.float64),
        group=group,
        basis=basis,
        n_obs=n_obs,
        df=df,
        covariates=Z,
    )


def _shift(P: np.ndarray, ML: np.ndarray, rows: slice, n_obs: np.ndarray):
    """Per mask (rows of the products with the 0/1 masks): the feature's observed count there and the
    shift ``d`` of its mean there from the mean over all analysed samples."""
    nob = n_obs[:, None] - ML[rows]
    return nob, P[rows] / np.maximum(nob, 1.0)


def _summaries(block: Block, sums_v: np.ndarray, nob: np.ndarray, n: np.ndarray):
    """Each response's observed mean and missing rate of the features, as its own pass gives them.

    ``sums_v`` (R, w) are sums of the centred values over each response's samples; adding back the
    overall mean gives the sums of the stored values, exact integers for int8 (so rounded to them, the
    mean is the correctly rounded quotient a one-response pass computes).
    """
    sums = sums_v + nob * block.mean
    if block.raw.dtype == np.int8:
        sums = np.rint(sums)
    return sums / np.maximum(nob, 1.0), (n[:, None] - nob) / np.maximum(n[:, None], 1.0)


def _int8_mask_sums(block: Block, masks32: np.ndarray, lists: MaskRows | None = None):
    """Per mask, the sums of x, of x^2 and of the missing indicator over its samples, for an int8 block:
    one float32 product of the 0/1 masks with ``[x | x^2 | missing]``, exact (sums of small integers
    below 2^24), or None when the block is not int8 or its sums could exceed that. With ``lists`` the same
    integers are summed over the listed samples instead."""
    if block.raw.dtype != np.int8:
        return None
    n_obs = block.n_samples - block.n_missing
    if block.width == 0 or np.max(block.sumsq + n_obs * block.mean**2) >= 2.0**23:
        return None
    if lists is not None:
        return _gathered_sums(block.raw, lists)
    w = block.width
    cols = np.flatnonzero(block.n_missing)
    xs = np.empty((block.n_samples, 2 * w + cols.size), np.float32)
    x, x2, miss = xs[:, :w], xs[:, w : 2 * w], xs[:, 2 * w :]
    np.copyto(x, block.raw, casting="unsafe")
    if cols.size:
        np.equal(np.take(block.raw, cols, axis=1), MISSING_INT8, out=miss, casting="unsafe")
        x[:, cols] *= 1.0 - miss
    np.multiply(x, x, out=x2)
    sums = (masks32 @ xs).astype(np.float64)
    n_miss = np.zeros((masks32.shape[0], w))
    n_miss[:, cols] = sums[:, 2 * w :]
    return sums[:, :w], sums[:, w : 2 * w], n_miss


def linear_multi_statistics(block: Block, state: MultiLinearState) -> dict[str, np.ndarray]:
    """Per-feature, per-response statistics of one block.

    Returns
    -------
    dict of ndarray of shape (width, K)
        ``score`` = |correlation|, ``correlation`` (partial, over the response's samples), ``t``,
        ``p_value`` (two-sided), ``degenerate`` (constant on the response's samples, or explained by
        the covariates there); and the engine's ``mean`` and ``missing_rate`` of each feature over
        each response's samples, and ``constant`` (no variation on them).
    """
    K, G = state.n_responses, state.groups.shape[1]
    q = state.basis.shape[2]
    sums = _int8_mask_sums(block, state.masks32, state.gather)
    # Masks given as lists of samples: the covariates' products from q0 shared rows (`CovariateLists`).
    lists = sums is not None and state.cov_lists is not None and state.gather is not None
    if sums is not None:
        # int8: the masks' counts and sums are exact integers (float32 product), so each response's
        # mean, centred sum of squares and constant flag are those of its own pass, bit for bit.
        s1, s2, n_miss = sums
        nob = state.n_obs[:, None] - n_miss
        safe = np.maximum(nob, 1.0)
        mean = s1 / safe
        d = mean - block.mean
        num = nob * s2 - s1 * s1
        ss = num / safe
        constant = (nob < 2) | (num == 0)
        missing = n_miss / np.maximum(state.n_obs[:, None], 1.0)
        lhs_t = state.resp_lists_t if lists else state.resp_t
        P = block.cross(lhs_t)  # (K + G q, w), or (K + q0, w) with the lists
        ML = _with_missing(block, lhs_t, P)
        B = K  # the basis rows start here
    else:
        lhs_t = state.lhs_t
        P = block.cross(lhs_t)  # (K + G + G q, w)
        ML = _with_missing(block, lhs_t, P)
        gsl = slice(K, K + G)
        nob, d = _shift(P, ML, gsl, state.n_obs)
        sq = _squares(block, state.groups.T)  # (G, w): sum of v^2 over each mask's samples
        ss = sq - nob * d * d  # centred on the mask's own mean
        constant = (nob < 2) | (ss <= 1e-12 * np.maximum(sq, 1e-300))
        mean, missing = _summaries(block, P[gsl], nob, state.n_obs)
        B = K + G
    ss_full = ss
    if q and lists:
        Qx = _basis_products(block, state, P, ML, d, K)
        ss = ss - np.einsum("gqw,gqw->gw", Qx, Qx)
    elif q:
        Qx = (P[B:] + ML[B:] * np.repeat(d, q, axis=0)).reshape(G, q, -1)
        ss = ss - np.einsum("gqw,gqw->gw", Qx, Qx)
    degenerate_g = constant | (ss <= 1e-10 * np.maximum(ss_full, 1e-300))
    g = state.group
    if _accel.use_numba:
        return _linear_columns(block, state, P, ML, d, ss, degenerate_g, constant, mean, missing)
    a = P[:K] + d[g] * ML[:K]  # (K, w)
    degenerate = degenerate_g[g]
    denom = np.sqrt(np.where(degenerate, 1.0, ss[g]))
    corr = np.where(degenerate, 0.0, a / denom)
    np.clip(corr, -1.0, 1.0, out=corr)
    df = state.df[:, None].astype(np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = corr * np.sqrt(df / np.maximum(1.0 - corr**2, 1e-300))
    p = special.betainc(0.5 * df, 0.5, df / (df + t**2))
    p = np.where(degenerate, 1.0, p)
    return {
        "score": np.abs(corr).T,
        "correlation": corr.T,
        "t": np.where(degenerate, 0.0, t).T,
        "p_value": p.T,
        "degenerate": degenerate.T,
        "mean": mean[g].T,
        "missing_rate": missing[g].T,
        "constant": (constant[g] | block.constant).T,
    }


# fmt: off
@_accel._jit
def _linear_columns_loop(
    P, ML, d, ss, deg_g, const_g, mean_g, miss_g, block_const, group, df,
    score, corr, t, x, deg, mean, miss, const,
):  # pragma: no cover - compiled
    # fmt: on
    # The numpy route's arithmetic, operation for operation (no contraction into fused multiply-adds),
    # written straight into the (width, K) layout the pass records; x = df / (df + t^2) for betainc.
    K, w = group.size, P.shape[1]
    for j0 in range(0, w, 64):
        j1 = min(j0 + 64, w)
        for k in range(K):
            g = group[k]
            f = df[k]
            for j in range(j0, j1):
                dead = deg_g[g, j]
                c = 0.0
                if not dead:
                    c = (P[k, j] + d[g, j] * ML[k, j]) / np.sqrt(ss[g, j])
                    if c > 1.0:
                        c = 1.0
                    elif c < -1.0:
                        c = -1.0
                u = 1.0 - c * c
                if not u >= 1e-300 and u == u:
                    u = 1e-300
                tt = c * np.sqrt(f / u)
                corr[j, k] = c
                score[j, k] = abs(c)
                t[j, k] = 0.0 if dead else tt
                x[j, k] = f / (f + tt * tt)
                deg[j, k] = dead
                mean[j, k] = mean_g[g, j]
                miss[j, k] = miss_g[g, j]
                const[j, k] = const_g[g, j] or block_const[j]


def _linear_columns(block, state, P, ML, d, ss, degenerate_g, constant, mean, missing):
    """`linear_multi_statistics`'s columns from the products, by one compiled loop (the same values
    as its numpy route, bit for bit), in the (width, K) layout of the pass's records."""
    K, w = state.n_responses, block.width
    cols = {c: np.empty((w, K)) for c in ("score", "correlation", "t", "mean", "missing_rate")}
    x = np.empty((w, K))
    deg, const = np.empty((w, K), bool), np.empty((w, K), bool)
    df = state.df.astype(np.float64)
    _linear_columns_loop(
        P, ML, d, ss, degenerate_g, constant, mean, missing, block.constant, state.group, df,
        cols["score"], cols["correlation"], cols["t"], x, deg, cols["mean"], cols["missing_rate"],
        const,
    )  # fmt: skip
    p = special.betainc(0.5 * df, 0.5, x)
    p[deg] = 1.0
    return {**cols, "p_value": p, "degenerate": deg, "constant": const}


# --------------------------------------------------------------------------------------------
# Logistic and Poisson families: the score test


@dataclass(frozen=True)
class MultiScoreState:
    """Response state of a GLM score-test pass over K responses, each null fit on its own samples.

    Attributes
    ----------
    family : {"logistic", "poisson"}
    mask : ndarray of shape (n, K), float 0/1
    resid : ndarray of shape (n, K)
        ``y_k - mu0_k`` on the samples of response k, 0 elsewhere.
    w0 : ndarray of shape (n, K)
        Null working weights (0 outside the samples).
    basis : ndarray of shape (K, n, c)
        ``W0 C L^-T`` per response (`GLMState.score_basis`), 0 outside its samples.
    variance : ndarray of shape (n, K)
        Per-sample variance of the empirical score-variance rules (0 elsewhere).
    dv : ndarray of shape (K, n, c)
        Whitened design times that variance (``D V``), for the empirical rules.
    dvd : ndarray of shape (K, c, c)
        ``D' V D``.
    dispersion : ndarray of shape (K,)
    empirical : bool
        The score's variance is estimated from the data (``"quadratic"``, ``"sandwich"``).
    n_obs : ndarray of shape (K,)
    """

    family: str
    mask: np.ndarray
    resid: np.ndarray
    w0: np.ndarray
    basis: np.ndarray
    variance: np.ndarray
    dv: np.ndarray
    dvd: np.ndarray
    dispersion: np.ndarray
    empirical: bool
    n_obs: np.ndarray
    lhs_t: np.ndarray = field(default=None, repr=False, compare=False)  # type: ignore[assignment]
    sq_t: np.ndarray = field(default=None, repr=False, compare=False)  # type: ignore[assignment]

    def __post_init__(self) -> None:
        if self.lhs_t is None:
            K, n, c = self.basis.shape
            parts = [self.resid.T, self.mask.T, self.basis.transpose(0, 2, 1).reshape(K * c, n)]
            sq = [self.w0.T, self.mask.T]
            if self.empirical:
                parts.append(self.dv.transpose(0, 2, 1).reshape(K * c, n))
                sq.append(self.variance.T)
            object.__setattr__(self, "lhs_t", np.ascontiguousarray(np.vstack(parts)))
            object.__setattr__(self, "sq_t", np.ascontiguousarray(np.vstack(sq)))

    @property
    def n_responses(self) -> int:
        return self.mask.shape[1]

    @property
    def n_nulls(self) -> int:
        return 0


def prepare_score_multi(
    family: str, Y, covariates: np.ndarray | None = None, *, dispersion: str = "fixed"
) -> MultiScoreState:
    """Null fits of the K responses of ``Y`` (NaN: sample not in response k), each on its own samples.

    Parameters
    ----------
    family : {"logistic", "poisson"}
    Y : ndarray of shape (n, K)
    covariates : ndarray of shape (n, q), optional
    dispersion : {"fixed", "pearson", "quadratic", "sandwich"}
        As for `prepare_poisson` (logistic: "fixed").
    """
    Y = _as_matrix(Y)
    n, K = Y.shape
    mask = response_masks(Y)
    Z = as_covariates(covariates, n)
    c = 1 + Z.shape[1]
    resid, w0, var = np.zeros((n, K)), np.zeros((n, K)), np.zeros((n, K))
    basis, dv = np.zeros((K, n, c)), np.zeros((K, n, c))
    dvd, phi, n_obs = np.zeros((K, c, c)), np.ones(K), np.zeros(K)
    empirical = dispersion in ("quadratic", "sandwich")
    for k in range(K):  # once per pass: each response's null fit on its own samples
        rows = np.flatnonzero(mask[:, k])
        try:
            st = prepare_glm(
                family, Y[rows, k], Z[rows], None, test="score", dispersion=dispersion,
                max_iter=25, tol=1e-10,
            )  # fmt: skip
        except ValueError as exc:
            raise ValueError(f"response {k}: {exc}") from None
        resid[rows, k] = st.y - st.mu0
        w0[rows, k] = st.w0
        basis[k][rows] = st.score_basis
        phi[k] = st.dispersion
        n_obs[k] = rows.size
        if empirical:
            D = st.score_basis / st.w0[:, None]
            var[rows, k] = st.variance
            dv[k][rows] = D * st.variance[:, None]
            dvd[k] = D.T @ (D * st.variance[:, None])
    return MultiScoreState(
        family=family,
        mask=mask.astype(np.float64),
        resid=resid,
        w0=w0,
        basis=basis,
        variance=var,
        dv=dv,
        dvd=dvd,
        dispersion=phi,
        empirical=empirical,
        n_obs=n_obs,
    )


def score_multi_statistics(block: Block, state: MultiScoreState) -> dict[str, np.ndarray]:
    """Rao score test of ``b_j = 0`` in ``y_k ~ 1 + covariates + x_j`` for every feature and response.

    Returns
    -------
    dict of ndarray of shape (width, K)
        The columns of the one-response score test (`logistic_statistics` with ``test="score"``):
        ``score`` = score_chi2 / 2, ``score_chi2``, ``z``, ``p_value``, ``beta``, ``std_error``,
        ``std_beta``, ``degenerate``; ``mean``, ``missing_rate``, ``constant`` as in
        `linear_multi_statistics`.
    """
    K, _, c = state.basis.shape
    lhs_t = state.lhs_t
    P = block.cross(lhs_t)
    ML = _with_missing(block, lhs_t, P)
    S = _squares(block, state.sq_t)
    MS = _with_missing(block, state.sq_t, S)
    # Missing values of the feature are imputed by its mean over the response's samples: in the frame
    # of v that is d on the missing entries (a shift on the observed ones is absorbed by the intercept).
    nob, d = _shift(P, ML, slice(K, 2 * K), state.n_obs)
    u = P[:K] + d * ML[:K]
    dc = np.repeat(d, c, axis=0)
    gx = (P[2 * K : 2 * K + K * c] + dc * ML[2 * K : 2 * K + K * c]).reshape(K, c, -1)
    w0xx = S[:K] + d * d * MS[:K]
    msq = S[K : 2 * K]
    sumsq = msq - nob * d * d
    constant = (nob < 2) | (sumsq <= 1e-12 * np.maximum(msq, 1e-300))
    info = w0xx - np.einsum("kcw,kcw->kw", gx, gx)
    dead = constant | ~(info > 1e-10 * w0xx)
    info = np.where(dead, 1.0, info)
    if state.empirical:
        lo = 2 * K + K * c
        dvx = (P[lo:] + dc * ML[lo:]).reshape(K, c, -1)
        xvx = S[2 * K :] + d * d * MS[2 * K :]
        var_u = (
            xvx
            - 2.0 * np.einsum("kcw,kcw->kw", gx, dvx)
            + np.einsum("kcw,kce,kew->kw", gx, state.dvd, gx)
        )
        var_u = np.where(dead, 1.0, var_u)
        dead = dead | ~(var_u > 0)
        var_u = np.where(dead, 1.0, var_u)
    else:
        var_u = state.dispersion[:, None] * info
    mean, missing = _summaries(block, P[K : 2 * K], nob, state.n_obs)
    return score_test_columns(
        block,
        state.n_obs,
        u,
        info,
        var_u,
        np.sqrt(var_u) / info,
        dead,
        constant,
        sumsq,
        mean,
        missing,
    )


def score_test_columns(
    block: Block,
    n_obs: np.ndarray,
    u: np.ndarray,
    info: np.ndarray,
    var_u: np.ndarray,
    std_error: np.ndarray,
    dead: np.ndarray,
    constant: np.ndarray,
    sumsq: np.ndarray,
    mean: np.ndarray,
    missing: np.ndarray,
) -> dict[str, np.ndarray]:
    """The statistics of a K-response score test (GLM or Cox), shape (width, K) each.

    Parameters
    ----------
    block : Block
    n_obs : ndarray of shape (K,)
        Samples of each response.
    u, info, var_u : ndarray of shape (K, width)
        The score, the (efficient) information and the score's variance (``info`` for a model-based
        variance); 1 where ``dead``.
    std_error : ndarray of shape (K, width)
        Of the one-step estimate ``u / info`` (``sqrt(var_u) / info``; Cox: ``1 / sqrt(info)``).
    dead : ndarray of bool of shape (K, width)
        No information left: the feature scores 0 and is ``degenerate``.
    constant, sumsq, mean, missing : ndarray of shape (K, width)
        Per response: a constant feature, its centred sum of squares, mean and missing rate.
    """
    chi2 = np.where(dead, 0.0, u * u / var_u)
    beta = np.where(dead, 0.0, u / info)
    return {
        "mean": mean.T,
        "missing_rate": missing.T,
        "constant": (constant | block.constant).T,
        "score": (0.5 * chi2).T,
        "score_chi2": chi2.T,
        "z": np.where(dead, 0.0, u / np.sqrt(var_u)).T,
        "p_value": np.where(dead, 1.0, special.chdtrc(1, chi2)).T,
        "beta": beta.T,
        "std_error": np.where(dead, np.inf, std_error).T,
        "std_beta": (beta * np.sqrt(np.maximum(sumsq, 0.0) / n_obs[:, None])).T,
        "degenerate": dead.T,
    }


__all__ = [
    "MultiLinearState",
    "MultiScoreState",
    "linear_multi_statistics",
    "prepare_linear_multi",
    "prepare_score_multi",
    "response_masks",
    "score_multi_statistics",
]
