"""Marginal GLM screening (logistic, Poisson): one maximum-likelihood fit per feature, batched over a block.

For feature j the kernel fits ``g(E y_i) = eta0_i + a_j + b_j x_ij`` by maximum likelihood, the marginal
utility of Fan & Song (2010), where ``eta0`` is the linear predictor of the null model fitted once in
`prepare_logistic` / `prepare_poisson`: intercept, covariates and the explicit ``offset`` (the linear
predictor of a current model in the iterative pass). All features of a block take their Newton steps
together: each step is a few whole-array operations and a batch of tiny solves, never a loop over features.

Covariates
----------
``covariate_mode="offset"`` (the default): the covariate coefficients are fitted once without any feature and
then held fixed inside ``eta0``; per feature only the intercept and ``b_j`` are refitted (2 x 2 systems).
``b_j`` is then the effect of x_j with the covariate effects fixed at their null-model values, and the
likelihood ratio is a lower bound of the joint one (same null, smaller alternative).
``covariate_mode="joint"``: intercept, covariates and ``b_j`` are all refitted per feature ((q + 2)-square
systems), which is the textbook ``y ~ 1 + Z + x_j`` fit and costs a few more matrix products per step.

Statistics (``test="lr"``, the default)
----------------------------------------
``beta`` (per unit of the feature), ``std_error`` and ``z`` (Wald, from the observed information),
``lr_chi2`` (twice the log-likelihood gain over the null), ``p_value`` (chi-square, 1 df, of ``lr_chi2``),
``score`` = ``lr_chi2 / 2`` (the likelihood reduction R_j of Fan & Song), ``std_beta`` (``beta`` per standard
deviation of the feature; ``|std_beta|`` is the other utility of Fan & Song), ``converged``, ``separated``
(logistic only), ``n_iter`` and ``degenerate`` (constant, or no information left after the adjustment).

``test="score"``: the Rao score test of ``b_j = 0`` from one matrix product per block, adjusted for the
intercept and every covariate whatever ``covariate_mode`` (at ``b_j = 0`` both modes share the null fit):
``score_chi2``, ``z``, ``p_value``, ``beta`` and ``std_error`` (the one-step estimate U / I and 1 / sqrt(I)),
``std_beta``, ``score`` = ``score_chi2 / 2`` (the quadratic approximation of the likelihood reduction).

Newton iterations
-----------------
Every feature starts at the null fit (b_j = 0), where score and information are matrix products, so the
first trial point is the one-step estimate. Each further evaluation is one pass of exp() over the tile and
the sums over samples of the deviance, score and information. A step that raises the deviance is halved;
a feature stops when the predicted deviance decrease ``g' H^-1 g`` of its next step is at most ``tol``
(default 1e-10), and that step is then taken without another evaluation. Null features typically need two
evaluations. Under (quasi-)separation the maximum likelihood estimate does not exist: the steps (damped
where the information has become singular) run until the deviance stops falling or ``max_iter``;
``separated`` flags the feature, ``beta`` is the large value reached, ``lr_chi2`` approaches its supremum
and ``std_error`` may be infinite. A block is worked on in tiles of columns (`TILE_BYTES`), and a tile's working columns shrink
as features converge. With numba installed (the store's switch ``_accel.use_numba``), the sums over
samples are one compiled pass; the numpy route computes the same sums with array operations.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np
from scipy import special

from ..store import _accel
from ..store._reader import Block
from ._newton import damped_newton

FAMILIES = ("logistic", "poisson")
COVARIATE_MODES = ("offset", "joint")
TESTS = ("lr", "score")

#: A fitted feature term whose range on the linear-predictor scale exceeds this is reported as (quasi-)
#: separated: an odds ratio above e^20 across the observed values means fitted probabilities at 0 or 1.
SEPARATION_ETA_RANGE = 20.0
#: Columns per tile: each tile's Newton iterations run on arrays of about this many bytes, which stay in
#: cache, instead of streaming the whole block through memory once per array operation.
TILE_BYTES = 4 * 2**20
#: A tile's working columns are copied smaller once fewer than this fraction still iterate: one copy
#: costs less than a Newton evaluation of the converged columns.
SHRINK = 0.8


@dataclass(frozen=True)
class GLMState:
    """Response state of a marginal GLM pass, built once and shared by every block.

    Attributes
    ----------
    family : {"logistic", "poisson"}
    y : ndarray of shape (n,)
    eta0 : ndarray of shape (n,)
        Linear predictor of the null fit (offset, intercept and covariates).
    mu0, w0 : ndarray of shape (n,)
        Fitted means and working weights of the null fit.
    design : ndarray of shape (n, k)
        Columns refitted with each feature: the intercept alone (offset mode) or intercept and covariates.
    score_basis : ndarray of shape (n, k_all)
        ``W0 C L^-T`` with ``L L' = C' W0 C`` for C = [1, covariates]: ``|score_basis' x|^2`` is the
        part of ``x' W0 x`` the nuisance parameters explain.
    deviance0 : float
        -2 log-likelihood of the null fit, without the saturated-model constant (it cancels in ratios).
    covariate_mode, test : str
    max_iter : int
        Cap on Newton evaluations per feature (step halvings included).
    tol : float
        Convergence when the predicted deviance decrease of the next Newton step is below ``tol``.
    """

    family: str
    y: np.ndarray
    eta0: np.ndarray
    mu0: np.ndarray
    w0: np.ndarray
    design: np.ndarray
    score_basis: np.ndarray
    deviance0: float
    covariate_mode: str
    test: str
    max_iter: int
    tol: float

    @property
    def n_samples(self) -> int:
        return self.y.shape[0]

    @property
    def intercept_only(self) -> bool:
        return self.design.shape[1] == 1

    @property
    def eta0_constant(self) -> bool:
        return bool(np.all(self.eta0 == self.eta0[0]))


@dataclass(frozen=True)
class LogisticState(GLMState):
    """`GLMState` of a logistic pass (y in [0, 1])."""


@dataclass(frozen=True)
class PoissonState(GLMState):
    """`GLMState` of a Poisson pass (y >= 0, log link)."""


# ----------------------------------------------------------------------------------------------- families
def _mean(family: str, eta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and working weight of the canonical link at ``eta`` (small arrays: the null fit)."""
    if family == "logistic":
        mu = special.expit(eta)
        return mu, mu * (1.0 - mu)
    mu = np.exp(np.minimum(eta, 700.0))
    return mu, mu


def _deviance(family: str, y: np.ndarray, eta: np.ndarray) -> float:
    """-2 log-likelihood without the saturated constant (small arrays: the null fit)."""
    if family == "logistic":
        # -l = sum (1 - y) eta + log(1 + e^-eta): exact for large |eta| of either sign.
        return float(2.0 * (np.dot(1.0 - y, eta) + np.logaddexp(0.0, -eta).sum()))
    return float(-2.0 * (np.dot(y, eta) - np.exp(np.minimum(eta, 700.0)).sum()))


def _fit_null(family: str, y: np.ndarray, C: np.ndarray, offset: np.ndarray, max_iter: int = 100):
    """Newton fit of the null model ``eta = offset + C gamma`` with step halving."""
    gamma = np.zeros(C.shape[1])
    if family == "logistic":
        p = np.clip(y.mean(), 1e-12, 1 - 1e-12)
        gamma[0] = np.log(p / (1 - p)) - np.mean(offset)
    else:
        gamma[0] = np.log(max(y.mean(), 1e-300)) - np.log(max(np.exp(offset).mean(), 1e-300))

    def evaluate(g0: np.ndarray):
        eta = offset + C @ g0
        mu, w = _mean(family, eta)
        return _deviance(family, y, eta), C.T @ (y - mu), C.T @ (C * w[:, None])

    gamma, (dev, _, _) = damped_newton(
        evaluate, gamma, max_iter=max_iter, what=f"{family} null fit on the covariates"
    )
    eta = offset + C @ gamma
    _, w = _mean(family, eta)
    if family == "logistic" and C.shape[1] > 1 and np.min(w) < 1e-12:
        raise ValueError("the covariates separate the outcome: fitted probabilities reach 0 or 1")
    return gamma, eta, dev


def check_rank(C: np.ndarray) -> None:
    """Refuse adjustment columns that are constant or collinear (with each other or the intercept)."""
    if C.shape[1] and np.linalg.matrix_rank(C) < C.shape[1]:
        raise ValueError(
            f"the {C.shape[1]} adjustment columns are collinear on these samples "
            "(a covariate is constant or a combination of the others)"
        )


def _prepare(family, y, covariates, offset, covariate_mode, test, max_iter, tol) -> GLMState:
    y = np.asarray(y, dtype=np.float64)
    if y.ndim != 1:
        raise ValueError(f"the outcome 'y' must be 1-D; got shape {y.shape}")
    n = y.shape[0]
    if not np.all(np.isfinite(y)):
        raise ValueError("the outcome 'y' has non-finite values")
    if family == "logistic" and (y.min() < 0 or y.max() > 1 or y.min() == y.max()):
        raise ValueError("the logistic outcome 'y' must lie in [0, 1] and take both values")
    if family == "poisson" and (y.min() < 0 or y.max() == 0):
        raise ValueError("the Poisson outcome 'y' must be non-negative and not all zero")
    if covariate_mode not in COVARIATE_MODES:
        raise ValueError(f"covariate_mode must be one of {COVARIATE_MODES}; got {covariate_mode!r}")
    if test not in TESTS:
        raise ValueError(f"test must be one of {TESTS}; got {test!r}")
    if max_iter < 1 or not tol > 0:
        raise ValueError(f"max_iter must be >= 1 and tol > 0; got {max_iter}, {tol}")
    off = np.zeros(n) if offset is None else np.asarray(offset, dtype=np.float64).reshape(-1)
    if off.shape != (n,) or not np.all(np.isfinite(off)):
        raise ValueError(f"'offset' must be a finite array of shape ({n},); got shape {off.shape}")
    Z = np.empty((n, 0)) if covariates is None else np.asarray(covariates, dtype=np.float64)
    Z = Z.reshape(n, -1) if Z.ndim == 1 else Z
    if Z.shape[0] != n or not np.all(np.isfinite(Z)):
        raise ValueError(f"'covariates' must be finite with {n} rows; got shape {Z.shape}")
    C = np.hstack([np.ones((n, 1)), Z])
    check_rank(C)
    _, eta0, dev0 = _fit_null(family, y, C, off)
    mu0, w0 = _mean(family, eta0)
    # Whitened nuisance columns: x' W0 x - |G' x|^2 is the efficient information of b_j.
    L = np.linalg.cholesky(C.T @ (C * w0[:, None]))
    G = np.linalg.solve(L, (C * w0[:, None]).T).T
    design = C if covariate_mode == "joint" else C[:, :1]
    cls = LogisticState if family == "logistic" else PoissonState
    return cls(
        family=family,
        y=y,
        eta0=eta0,
        mu0=mu0,
        w0=w0,
        design=np.ascontiguousarray(design),
        score_basis=np.ascontiguousarray(G),
        deviance0=dev0,
        covariate_mode=covariate_mode,
        test=test,
        max_iter=int(max_iter),
        tol=float(tol),
    )


def prepare_logistic(
    y: np.ndarray,
    covariates: np.ndarray | None = None,
    offset: np.ndarray | None = None,
    *,
    covariate_mode: str = "offset",
    test: str = "lr",
    max_iter: int = 25,
    tol: float = 1e-10,
) -> LogisticState:
    """Build the response state of a logistic pass.

    Parameters
    ----------
    y : ndarray of shape (n,)
        Outcome in [0, 1] (0/1 in practice).
    covariates : ndarray of shape (n, q), optional
        Adjustment variables; see the module docstring for ``covariate_mode``.
    offset : ndarray of shape (n,), optional
        Fixed part of the linear predictor (for example the current model of the iterative pass); it is
        added to the covariate fit, not refitted.
    covariate_mode : {"offset", "joint"}
    test : {"lr", "score"}
        Full Newton fits with Wald and likelihood-ratio statistics, or the one-product score test.
    max_iter : int
        Newton evaluations per feature at most (each step halving counts as one).
    tol : float
        Stop when the predicted deviance decrease of the next Newton step is below ``tol``; that step is
        then taken without a further evaluation.
    """
    return _prepare("logistic", y, covariates, offset, covariate_mode, test, max_iter, tol)


def prepare_poisson(
    y: np.ndarray,
    covariates: np.ndarray | None = None,
    offset: np.ndarray | None = None,
    *,
    covariate_mode: str = "offset",
    test: str = "lr",
    max_iter: int = 25,
    tol: float = 1e-10,
) -> PoissonState:
    """Build the response state of a Poisson (log link) pass.

    Parameters are those of `prepare_logistic`; ``y`` holds non-negative counts, and ``offset`` is on the
    log scale (log exposure, or the current model's linear predictor).
    """
    return _prepare("poisson", y, covariates, offset, covariate_mode, test, max_iter, tol)


# ------------------------------------------------------------------------------------- batched Newton
def _solve(H: np.ndarray, g: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Newton steps of a stack of systems, damped where a system is (numerically) singular.

    Under separation the information along one direction fades geometrically while the likelihood
    still rises; there a Levenberg-Marquardt step ``(H + tau I)^-1 g``, ``tau = 1e-6 trace(H)``, keeps
    the fit moving (a step too long is halved by the caller's deviance check).

    Returns ``step`` (m, p), ``lam`` (m,) = g' step (the predicted deviance decrease) and ``ok`` (m,),
    False where no step exists (non-finite or zero information).
    """
    p = g.shape[1]
    if p == 1:
        h = H[:, 0, 0]
        ok = np.isfinite(h) & (h > 0)
        step = g / np.where(ok, h, 1.0)[:, None]
    else:
        finite = np.all(np.isfinite(H), axis=(1, 2)) & np.all(np.isfinite(g), axis=1)
        H = np.where(finite[:, None, None], H, np.eye(p))
        trace = np.trace(H, axis1=1, axis2=2)
        if p == 2:
            a, b, d = H[:, 0, 0], H[:, 0, 1], H[:, 1, 1]
            singular = ~(a * d - b * b > 1e-12 * a * d) | ~(a > 0)
        else:
            ev = np.linalg.eigvalsh(H)
            singular = ~(ev[:, 0] > 1e-12 * np.abs(ev[:, -1]))
        ok = finite & (trace > 0)
        H = H + np.where(singular & ok, 1e-6 * trace, 0.0)[:, None, None] * np.eye(p)
        H = np.where(ok[:, None, None], H, np.eye(p))
        if p == 2:
            a, b, d = H[:, 0, 0], H[:, 0, 1], H[:, 1, 1]
            det = a * d - b * b
            step = np.stack(
                [(d * g[:, 0] - b * g[:, 1]) / det, (a * g[:, 1] - b * g[:, 0]) / det], axis=1
            )
        else:
            step = np.linalg.solve(H, np.where(ok[:, None], g, 0.0)[:, :, None])[:, :, 0]
    step = np.where(ok[:, None], step, 0.0)
    lam = np.einsum("ij,ij->i", g, step)
    return step, lam, ok


def _last_inverse(H: np.ndarray) -> np.ndarray:
    """The last diagonal element of each inverse: the variance of the feature's coefficient."""
    p = H.shape[1]
    if p == 1:
        return 1.0 / H[:, 0, 0]
    if p == 2:
        return H[:, 0, 0] / (H[:, 0, 0] * H[:, 1, 1] - H[:, 0, 1] ** 2)
    ok = np.all(np.isfinite(H), axis=(1, 2))
    # pinv neither raises on a singular member of the stack nor needs a loop to skip it.
    inv = np.linalg.pinv(np.where(ok[:, None, None], H, np.eye(p)))[:, -1, -1]
    return np.where(ok, inv, np.nan)


@dataclass(frozen=True)
class NewtonResult:
    """Outcome of `newton` for m columns with p parameters each."""

    params: np.ndarray  # (m, p)
    deviance: np.ndarray  # (m,)
    hessian: np.ndarray  # (m, p, p), at the last evaluated point
    converged: np.ndarray  # (m,) bool
    n_iter: np.ndarray  # (m,) int


def newton(evaluate, start, dev0, g0, H0, *, max_iter: int, tol: float) -> NewtonResult:
    """Batched Newton-Raphson with step halving for m independent smooth convex problems.

    Parameters
    ----------
    evaluate : callable
        ``evaluate(cols, params) -> (deviance (c,), gradient (c, p), hessian (c, p, p))`` for the columns
        ``cols`` (sorted int array) at ``params`` of shape (c, p); gradient of the log-likelihood, Hessian of
        the negative log-likelihood, so the Newton step is ``H^-1 g``.
    start : ndarray of shape (m, p)
        Point where ``dev0`` (m,), ``g0`` (m, p) and ``H0`` (m, p, p) were computed.
    max_iter : int
        Evaluations per column at most; a step whose deviance rises is halved (and counts as one).
    tol : float
        A column converges when ``g' H^-1 g``, the predicted deviance decrease of the next step, is at most
        ``tol``; that step is taken without another evaluation and its predicted decrease subtracted.
    """
    m, _ = start.shape
    acc, acc_dev, acc_H = start.copy(), np.asarray(dev0, dtype=np.float64).copy(), H0.copy()
    step, lam, ok = _solve(H0, g0)
    out, out_dev = acc + step, acc_dev - lam
    converged = ok & (lam <= tol)
    active = ok & ~converged
    scale = np.ones(m)
    n_iter = np.zeros(m, dtype=np.int64)
    while True:
        idx = np.flatnonzero(active & (n_iter < max_iter))
        if idx.size == 0:
            break
        trial = acc[idx] + scale[idx, None] * step[idx]
        dev, g, H = evaluate(idx, trial)
        n_iter[idx] += 1
        base = acc_dev[idx]
        # Slack for rounding in the deviance sums, so a converging step is not mistaken for a rise.
        better = np.isfinite(dev) & (dev <= base + 1e-9 * (1.0 + np.abs(base)))
        worse = idx[~better]
        scale[worse] *= 0.5
        active[worse[scale[worse] < 2.0**-30]] = False
        good = idx[better]
        s, lam, okh = _solve(H[better], g[better])
        acc[good], acc_dev[good], acc_H[good] = trial[better], dev[better], H[better]
        step[good], scale[good] = s, 1.0
        active[good[~okh]] = False
        fin = okh & (lam <= tol)
        done = good[fin]
        converged[done], active[done] = True, False
        out[done], out_dev[done] = acc[done] + s[fin], acc_dev[done] - lam[fin]
    stopped = ~converged
    out[stopped], out_dev[stopped] = acc[stopped], acc_dev[stopped]
    return NewtonResult(out, out_dev, acc_H, converged, n_iter)


_local = threading.local()


class Workspace:
    """Per-thread buffers of one tile: its columns still being iterated, their squares, two scratch arrays.

    Fresh arrays of a block's size cost a page fault per 4 KiB on every use, and a whole-block array
    streams through memory once per operation; tile-sized buffers reused for every step stay in cache.
    """

    def __init__(self, n: int, tile: int):
        self.n, self.tile = n, tile
        self._flat = [np.empty(n * tile) for _ in range(4)]
        self.idx = np.arange(0)
        self.x = self.xx = self._view(0, 0)

    @classmethod
    def get(cls, n: int, tile: int) -> Workspace:
        ws = getattr(_local, "workspace", None)
        if ws is None or ws.n != n or ws.tile < tile:
            ws = _local.workspace = cls(n, tile)
        return ws

    def _view(self, i: int, c: int) -> np.ndarray:
        return self._flat[i][: self.n * c].reshape(self.n, c)

    def load(self, x: np.ndarray, square: bool) -> np.ndarray:
        """Copy a tile (n, c) of a block into the workspace, its square into `xx` if asked.

        A tile is a strided view whose rows lie a block's width apart: every pass over it would touch
        a new memory page per row. The contiguous copy costs one such pass and saves the others.
        """
        self.idx, self.x = np.arange(x.shape[1]), self._view(0, x.shape[1])
        np.copyto(self.x, x)
        self.xx = self._view(3, x.shape[1] if square else 0)
        if square:
            np.multiply(self.x, self.x, out=self.xx)
        return self.x

    def release(self) -> None:
        """Forget the current tile."""
        self.idx, self.x = np.arange(0), self._view(0, 0)

    def take(self, cols: np.ndarray) -> np.ndarray:
        """Positions of ``cols`` in `x`, after shrinking `x` when they are under `SHRINK` of it."""
        if cols.size < SHRINK * self.idx.size:
            keep = np.searchsorted(self.idx, cols)
            square = self.xx.shape[1] > 0
            kept, kept_sq = self.x[:, keep], self.xx[:, keep] if square else None
            self.idx, self.x = cols, self._view(0, cols.size)
            np.copyto(self.x, kept)
            self.xx = self._view(3, cols.size if square else 0)
            if square:
                np.copyto(self.xx, kept_sq)
        return np.searchsorted(self.idx, cols)

    def scratch(self, i: int) -> np.ndarray:
        """Scratch array ``i`` (1 or 2) of the current working shape (n, c)."""
        return self._view(i, self.x.shape[1])


def sum_log(a: np.ndarray) -> np.ndarray:
    """Column sums of ``log(a)`` for positive ``a`` of shape (r, m), with one log per 16 rows.

    A logarithm costs several multiplies, so rows are multiplied in groups of 16 first; a group product
    that leaves the safe range of float64 sends its column to the direct sum.
    """
    r = a.shape[0] - a.shape[0] % 16
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        out = np.log(a[r:]).sum(axis=0) if r < a.shape[0] else np.zeros(a.shape[1])
        if r:
            prod = a[:r].reshape(r // 16, 16, -1).prod(axis=1)
            bad = ~np.all((prod > 1e-290) & (prod < 1e290), axis=0)
            out += np.log(prod, out=prod).sum(axis=0)
            if bad.any():
                out[bad] = np.log(a[:, bad]).sum(axis=0)
    return out


# ------------------------------------------------------------------------------------ compiled loops
# With numba (optional, the store's switch `_accel.use_numba`) the sums over samples of a Newton step are
# one fused pass over the tile instead of a dozen numpy passes; exp() stays with numpy, whose vectorised
# version is several times faster than numba's scalar one. The numpy route computes the same sums.


@_accel._jit
def linear_predictor(x, b, a, eta0, sign, out):  # pragma: no cover - compiled
    """``out = sign * (eta0_i + a_j + b_j x_ij)`` for a tile x (n, c)."""
    n, c = x.shape
    for i in range(n):
        e = eta0[i]
        for j in range(c):
            out[i, j] = sign * (e + a[j] + b[j] * x[i, j])


@_accel._jit
def _logistic_sums(t, x, out):  # pragma: no cover - compiled
    # t = exp(-eta). Rows of out: sum log(1 + t), sum mu, sum mu x, sum w, sum w x, sum w x^2 with
    # mu = 1 / (1 + t), w = mu (1 - mu). Accumulators are separate vectors (faster than rows of out).
    n, c = t.shape
    s0 = np.zeros(c)
    s1 = np.zeros(c)
    h0 = np.zeros(c)
    h1 = np.zeros(c)
    h2 = np.zeros(c)
    logs = np.zeros(c)
    prod = np.ones(c)
    for i0 in range(0, n, 16):
        i1 = min(i0 + 16, n)
        for i in range(i0, i1):
            ti = t[i]
            xi = x[i]
            for j in range(c):
                den = 1.0 + ti[j]
                prod[j] *= den
                mu = 1.0 / den
                w = mu - mu * mu
                v = xi[j]
                wv = w * v
                s0[j] += mu
                s1[j] += mu * v
                h0[j] += w
                h1[j] += wv
                h2[j] += wv * v
        for j in range(c):
            # One log per 16 factors >= 1; the product only overflows past |eta| ~ 44.
            if prod[j] < 1e300:
                logs[j] += np.log(prod[j])
            else:
                for i in range(i0, i1):
                    logs[j] += np.log(1.0 + t[i, j])
            prod[j] = 1.0
    for j in range(c):
        out[0, j] = logs[j]
        out[1, j] = s0[j]
        out[2, j] = s1[j]
        out[3, j] = h0[j]
        out[4, j] = h1[j]
        out[5, j] = h2[j]


@_accel._jit
def _weighted_moments(e, x, w, out):  # pragma: no cover - compiled
    # Rows of out: sum_i w_i e_ij x_ij^p, p = 0, 1, 2.
    n, c = e.shape
    m0 = np.zeros(c)
    m1 = np.zeros(c)
    m2 = np.zeros(c)
    for i in range(n):
        wi = w[i]
        ei = e[i]
        xi = x[i]
        for j in range(c):
            u = wi * ei[j]
            uv = u * xi[j]
            m0[j] += u
            m1[j] += uv
            m2[j] += uv * xi[j]
    for j in range(c):
        out[0, j] = m0[j]
        out[1, j] = m1[j]
        out[2, j] = m2[j]


@_accel._jit
def _weighted_sumsq(x, w, out):  # pragma: no cover - compiled
    # out_j = sum_i w_i x_ij^2
    n, c = x.shape
    for i in range(n):
        wi = w[i]
        xi = x[i]
        for j in range(c):
            v = xi[j]
            out[j] += wi * v * v


def weighted_sumsq(x: np.ndarray, w: np.ndarray) -> np.ndarray:
    """``sum_i w_i x_ij^2`` of shape (c,) for x (n, c)."""
    if _accel.use_numba:
        out = np.zeros(x.shape[1])
        _weighted_sumsq(x, w, out)
        return out
    return np.einsum("i,ij,ij->j", w, x, x)


# ---------------------------------------------------------------------------------------- evaluators
def _evaluate_joint(st: GLMState, ws: Workspace, yx: np.ndarray, sx: np.ndarray, idx, params):
    """Deviance, score and information of ``eta0 + C gamma + b x`` at ``params`` = [gamma, b]."""
    pos = ws.take(idx)
    x = ws.x
    C, k = st.design, st.design.shape[1]
    P = np.zeros((x.shape[1], k + 1))
    P[pos] = params
    gam, b = P[:, :k], P[:, k]
    yx, sx = yx[ws.idx], sx[ws.idx]
    eta = np.multiply(x, b, out=ws.scratch(1))
    if k == 1:
        eta += gam[:, 0]
    else:
        eta += C @ gam.T
    eta += st.eta0[:, None]
    if st.family == "logistic":
        np.negative(eta, out=eta)
        np.exp(eta, out=eta)
        eta += 1.0
        log_den = sum_log(eta)
        mu = np.reciprocal(eta, out=eta)
        v = 1.0 - st.y  # l = -sum (1 - y) eta - sum log(1 + e^-eta)
        ell = -(v @ st.eta0 + gam @ (v @ C) + b * (sx - yx)) - log_den
        mux = np.einsum("ij,ij->j", mu, x)
        Cmu = mu.sum(axis=0)[None] if k == 1 else C.T @ mu
        w = np.multiply(mu, mu, out=ws.scratch(2))
        np.subtract(mu, w, out=w)
    else:
        mu = np.exp(eta, out=eta)
        Cmu = mu.sum(axis=0)[None] if k == 1 else C.T @ mu
        ell = st.y @ st.eta0 + gam @ (st.y @ C) + b * yx - Cmu[0]
        w, mux = mu, None
    H = np.empty((x.shape[1], k + 1, k + 1))
    if k == 1:
        H[:, 0, 0] = w.sum(axis=0) if st.family == "logistic" else Cmu[0]
    else:
        rows, cols_ = np.triu_indices(k)
        H[:, rows, cols_] = ((C[:, rows] * C[:, cols_]).T @ w).T
        H[:, cols_, rows] = H[:, rows, cols_]
    wx = np.multiply(w, x, out=ws.scratch(2))
    Cwx = wx.sum(axis=0)[None] if k == 1 else C.T @ wx
    if mux is None:
        mux = Cwx[0]  # Poisson: w = mu
    H[:, :k, k] = H[:, k, :k] = Cwx.T
    H[:, k, k] = np.einsum("ij,ij->j", wx, x)
    g = np.empty((x.shape[1], k + 1))
    g[:, :k] = (st.y @ C)[None] - Cmu.T
    g[:, k] = yx - mux
    return -2.0 * ell[pos], g[pos], H[pos]


def _evaluate_logistic(st: GLMState, ws: Workspace, yx: np.ndarray, sx: np.ndarray, idx, params):
    """`_evaluate_joint` for the logistic model with the intercept alone, in fewer passes over the tile.

    numpy route: with m = mu and m2 = mu^2 the information needs sums of (m - m2) x^p, p = 0, 1, 2: six
    reductions that only read (x^2 is kept from the start), instead of forming the weights and products.
    """
    pos = ws.take(idx)
    x = ws.x
    a, b = np.zeros(x.shape[1]), np.zeros(x.shape[1])
    a[pos], b[pos] = params[:, 0], params[:, 1]
    t = ws.scratch(1)
    if _accel.use_numba:
        linear_predictor(x, b, a, st.eta0, -1.0, t)
        np.exp(t, out=t)
        sums = np.empty((6, x.shape[1]))
        _logistic_sums(t, x, sums)
        log_den, s0, s1, h00, h01, h11 = sums
    else:
        xx = ws.xx
        np.multiply(x, -b, out=t)
        if st.eta0_constant:  # no covariates nor offset: eta0 folds into the intercepts
            t -= a + st.eta0[0]
        else:
            t -= a
            t -= st.eta0[:, None]
        np.exp(t, out=t)
        t += 1.0
        log_den = sum_log(t)  # sum log(1 + e^-eta)
        mu = np.reciprocal(t, out=t)
        m2 = np.multiply(mu, mu, out=ws.scratch(2))
        s0, s1, s2 = mu.sum(axis=0), np.einsum("ij,ij->j", mu, x), np.einsum("ij,ij->j", mu, xx)
        q0, q1, q2 = m2.sum(axis=0), np.einsum("ij,ij->j", m2, x), np.einsum("ij,ij->j", m2, xx)
        h00, h01, h11 = s0 - q0, s1 - q1, s2 - q2
    v = 1.0 - st.y  # l = -sum (1 - y) eta - sum log(1 + e^-eta)
    yx, sx = yx[ws.idx], sx[ws.idx]
    ell = -(v @ st.eta0 + a * v.sum() + b * (sx - yx)) - log_den
    g = np.stack([st.y.sum() - s0, yx - s1], axis=1)
    H = np.empty((x.shape[1], 2, 2))
    H[:, 0, 0], H[:, 0, 1], H[:, 1, 1] = h00, h01, h11
    H[:, 1, 0] = H[:, 0, 1]
    return -2.0 * ell[pos], g[pos], H[pos]


def _evaluate_poisson_profile(st: GLMState, ws: Workspace, yx: np.ndarray, idx, params):
    """Poisson fit of ``eta0 + a + b x`` with ``a`` profiled out: exp(a) = sum(y) / sum(mu0 e^{b x})."""
    pos = ws.take(idx)
    x = ws.x
    b = np.zeros(x.shape[1])
    b[pos] = params[:, 0]
    e = ws.scratch(1)
    if _accel.use_numba:
        linear_predictor(x, b, np.zeros_like(b), np.zeros(x.shape[0]), 1.0, e)
        np.exp(e, out=e)
        s0, s1, s2 = sums = np.empty((3, x.shape[1]))
        _weighted_moments(e, x, st.mu0, sums)
    else:
        np.multiply(x, b, out=e)
        np.exp(e, out=e)
        s0 = st.mu0 @ e
        e *= x
        s1 = st.mu0 @ e
        e *= x
        s2 = st.mu0 @ e
    total = st.y.sum()
    m1 = s1 / s0
    # Log-likelihood gain over the null (where s0 = sum(y) and a = 0): sum(y) a + b y'x.
    gain = total * np.log(total / s0) + b * yx[ws.idx]
    dev = st.deviance0 - 2.0 * gain
    g = yx[ws.idx] - total * m1
    H = total * (s2 / s0 - m1 * m1)
    return dev[pos], g[pos, None], H[pos, None, None]


# ------------------------------------------------------------------------------------------- fitting
def _fit_tile(st: GLMState, ws: Workspace, tile: np.ndarray, sumsq, dead) -> dict[str, np.ndarray]:
    """Marginal fits of the columns of one tile (n, c) of a block; ``dead`` columns are not fitted."""
    n, c = tile.shape
    C, k = st.design, st.design.shape[1]
    # x^2 is kept for the numpy route of the intercept-only logistic model.
    x = ws.load(tile, square=st.family == "logistic" and k == 1 and not _accel.use_numba)
    if st.eta0_constant and k == 1:
        # No covariates nor offset: mu0 and w0 are constant, so x' mu0, x' w0 and x' W0 x follow from
        # the column sums and `sumsq`.
        cross = np.vstack([st.y, np.ones(n)]) @ x
        yx, sx = cross
        mu0x, Cw0x, w0xx = st.mu0[0] * sx, st.w0[0] * sx[None], st.w0[0] * sumsq
    else:
        lhs = np.column_stack([st.y, st.mu0, np.ones(n), C * st.w0[:, None]])
        cross = lhs.T @ x
        yx, mu0x, sx, Cw0x = cross[0], cross[1], cross[2], cross[3:]
        w0xx = st.w0 @ ws.xx if ws.xx.shape[1] else weighted_sumsq(x, st.w0)
    profile = st.family == "poisson" and k == 1
    if profile:
        H0 = (w0xx - mu0x**2 / st.y.sum())[:, None, None]
        g0 = (yx - mu0x)[:, None]
    else:
        H0 = np.empty((c, k + 1, k + 1))
        H0[:, :k, :k] = C.T @ (C * st.w0[:, None])
        H0[:, :k, k] = H0[:, k, :k] = Cw0x.T
        H0[:, k, k] = w0xx
        g0 = np.zeros((c, k + 1))
        g0[:, k] = yx - mu0x
    # No information left at the null (constant, or explained by the refitted covariates): not fitted.
    with np.errstate(invalid="ignore", divide="ignore"):
        dead = dead | ~(1.0 / _last_inverse(H0) > 1e-10 * w0xx)
    H0[dead] = np.nan  # never stepped, never evaluated
    if profile:

        def evaluate(idx, params):
            return _evaluate_poisson_profile(st, ws, yx, idx, params)

    else:
        fn = _evaluate_logistic if st.family == "logistic" and k == 1 else _evaluate_joint

        def evaluate(idx, params):
            return fn(st, ws, yx, sx, idx, params)

    p = H0.shape[1]
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        res = newton(
            evaluate,
            np.zeros((c, p)),
            np.full(c, st.deviance0),
            g0,
            H0,
            max_iter=st.max_iter,
            tol=st.tol,
        )
        var = _last_inverse(res.hessian)
    beta = res.params[:, -1]
    out = {
        "beta": beta,
        "var": var,
        "lr_chi2": st.deviance0 - res.deviance,
        "converged": res.converged,
        "n_iter": res.n_iter,
        "dead": dead,
    }
    if st.family == "logistic":
        # The range of a centred column is at most 2 sqrt(sumsq): only a few columns need the exact one.
        cand = np.flatnonzero(~dead & (np.abs(beta) * 2.0 * np.sqrt(sumsq) > SEPARATION_ETA_RANGE))
        sep = np.zeros(c, dtype=bool)
        if cand.size:
            xc = tile[:, cand]
            sep[cand] = (
                np.abs(beta[cand]) * (xc.max(axis=0) - xc.min(axis=0)) > SEPARATION_ETA_RANGE
            )
        out["separated"] = sep
    return out


def tiles(n: int, width: int) -> list[slice]:
    """Column ranges of about `TILE_BYTES` of float64 each (one empty range for an empty block)."""
    step = max(4, TILE_BYTES // (8 * max(n, 1)))
    return [slice(lo, min(lo + step, width)) for lo in range(0, width, step)] or [slice(0, 0)]


def _check_block(block: Block, st: GLMState) -> None:
    if block.n_samples != st.n_samples:
        raise ValueError(
            f"block at feature {block.start} has {block.n_samples} samples; "
            f"the {st.family} state was built for {st.n_samples}"
        )


def _lr_statistics(block: Block, st: GLMState) -> dict[str, np.ndarray]:
    _check_block(block, st)
    x, width = block.values, block.width
    ranges = tiles(x.shape[0], width)
    ws = Workspace.get(x.shape[0], max(1, ranges[0].stop - ranges[0].start))
    try:
        parts = [_fit_tile(st, ws, x[:, sl], block.sumsq[sl], block.constant[sl]) for sl in ranges]
    finally:
        ws.release()
    fit = {key: np.concatenate([part[key] for part in parts]) for key in parts[0]}
    dead = fit["dead"]
    # A fit stopped where the information is no longer positive (separation) keeps its estimate and
    # likelihood ratio but gets no finite standard error.
    var = np.where(dead | ~(fit["var"] > 0) | ~np.isfinite(fit["var"]), np.inf, fit["var"])
    beta = np.where(dead, 0.0, fit["beta"])
    se = np.sqrt(var)
    lr = np.where(dead, 0.0, np.maximum(fit["lr_chi2"], 0.0))
    out = {
        "score": 0.5 * lr,
        "beta": beta,
        "std_error": se,
        "z": np.where(dead, 0.0, beta / se),
        "lr_chi2": lr,
        "p_value": np.where(dead, 1.0, special.chdtrc(1, lr)),
        "std_beta": beta * np.sqrt(block.sumsq / x.shape[0]),
        "converged": fit["converged"] | dead,
        "n_iter": fit["n_iter"],
        "degenerate": dead,
    }
    if "separated" in fit:
        out["separated"] = fit["separated"] & ~dead
    return out


def _score_statistics(block: Block, st: GLMState) -> dict[str, np.ndarray]:
    """Rao score test of b_j = 0: U = x'(y - mu0), I = x'W0 x - |G'x|^2, from one matrix product."""
    _check_block(block, st)
    lhs_t = np.vstack([st.y - st.mu0, st.score_basis.T])
    if st.eta0_constant:
        # Constant weights (no covariates nor offset): x' W0 x = w0 sumsq, and the block gives the
        # cross-products straight from its stored values, without writing out the float64 block.
        cross = block.cross(lhs_t)
        w0xx = st.w0[0] * block.sumsq
    else:
        x = block.values
        cross = lhs_t @ x
        w0xx = weighted_sumsq(x, st.w0)
    u, gx = cross[0], cross[1:]
    info = w0xx - np.einsum("ij,ij->j", gx, gx)
    dead = block.constant | ~(info > 1e-10 * w0xx)
    info = np.where(dead, 1.0, info)
    chi2 = np.where(dead, 0.0, u * u / info)
    z = np.where(dead, 0.0, u / np.sqrt(info))
    beta = np.where(dead, 0.0, u / info)
    return {
        "score": 0.5 * chi2,
        "score_chi2": chi2,
        "z": z,
        "p_value": np.where(dead, 1.0, special.chdtrc(1, chi2)),
        "beta": beta,
        "std_error": np.where(dead, np.inf, 1.0 / np.sqrt(info)),
        "std_beta": beta * np.sqrt(block.sumsq / st.n_samples),
        "degenerate": dead,
    }


def logistic_statistics(block: Block, state: LogisticState) -> dict[str, np.ndarray]:
    """Marginal logistic statistics of one block.

    Returns
    -------
    dict of ndarray of shape (width,)
        With ``state.test == "lr"``: ``score`` (= lr_chi2 / 2), ``beta``, ``std_error``, ``z``, ``lr_chi2``,
        ``p_value``, ``std_beta``, ``converged``, ``separated``, ``n_iter``, ``degenerate``; with
        ``"score"``: ``score``, ``score_chi2``, ``z``, ``p_value``, ``beta``, ``std_error``, ``std_beta``,
        ``degenerate``. A constant feature has score 0, beta 0, p-value 1 and an infinite standard error.
    """
    if state.family != "logistic":
        raise ValueError(f"logistic_statistics needs a logistic state; got a {state.family} one")
    return (
        _score_statistics(block, state) if state.test == "score" else _lr_statistics(block, state)
    )


def poisson_statistics(block: Block, state: PoissonState) -> dict[str, np.ndarray]:
    """Marginal Poisson statistics of one block; the columns of `logistic_statistics` but ``separated``."""
    if state.family != "poisson":
        raise ValueError(f"poisson_statistics needs a Poisson state; got a {state.family} one")
    return (
        _score_statistics(block, state) if state.test == "score" else _lr_statistics(block, state)
    )
