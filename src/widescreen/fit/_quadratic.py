"""The working least-squares problem and its weighted-lasso solve.

Every fit in this package, Gaussian or IRLS step of a GLM / Cox fit, reduces to

    min_b  1 / (2 n) || sqrt(w) (z - C g - Xs b) ||^2  +  lam * sum_j v_j |b_j|   (+ ridge part)

over ``g`` (unpenalised: intercept and covariates ``C``) and ``b`` (penalised, standardised columns
``Xs``). ``g`` is profiled out by projecting ``sqrt(w) Xs`` and ``sqrt(w) z`` off the span of
``sqrt(w) C``; what remains is kept in Gram form (``G = Xt^T Xt``, ``c = Xt^T zt``, ``||zt||^2``), which
costs O(n d^2) once per IRLS step and then makes each solve independent of n.

Per-feature weights ``v_j`` come in by column rescaling (``b~_j = v_j b_j``); a feature with ``v_j = 0``
is unpenalised and profiled out of the Gram form exactly like ``C``; ``v_j = inf`` keeps it at zero.
The l1 solve itself is scikit-learn's coordinate descent (``enet_path`` in Gram mode).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import linalg


@dataclass(frozen=True)
class WorkingProblem:
    """A weighted least-squares problem in Gram form, with the unpenalised block profiled out.

    Either the Gram matrix is held (``reusable``: the Gaussian loss, where every solve of the path
    shares it) or only the projected design ``Xt``, from which the blocks a solve touches are formed
    on demand: an IRLS step's solve usually touches a small working set, so forming all of
    ``Xt^T Xt`` (O(n d^2)) at every step would dominate.

    Attributes
    ----------
    xty : ndarray of shape (d,)
        ``Xt^T zt`` with ``Xt`` (``zt``) the weighted standardised features (working response)
        projected off the unpenalised columns.
    yty : float
        ``zt^T zt``.
    n : int
        Number of samples (the 1 / (2n) scaling of the objective).
    qtz : ndarray of shape (q,)
        ``Q^T sqrt(w) z`` with ``sqrt(w) C = Q R``; recovers ``g``.
    qtx : ndarray of shape (q, d)
        ``Q^T sqrt(w) Xs``.
    r : ndarray of shape (q, q)
        The triangular factor ``R``.
    reusable : bool
        True when many solves share this problem: the Gram matrix is formed once, and also its
        inverse when large unpenalised sets are to be profiled out.
    design : ndarray of shape (n, d) or None
        ``Xt``, kept when the Gram matrix is formed lazily.
    """

    xty: np.ndarray
    yty: float
    n: int
    qtz: np.ndarray
    qtx: np.ndarray
    r: np.ndarray
    reusable: bool = False
    design: np.ndarray | None = field(default=None, repr=False)
    _cache: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def d(self) -> int:
        return self.xty.shape[0]

    @property
    def gram(self) -> np.ndarray:
        """The full Gram matrix ``Xt^T Xt`` of shape (d, d) (formed once on first use)."""
        if "gram" not in self._cache:
            self._cache["gram"] = np.ascontiguousarray(self.design.T @ self.design)
        return self._cache["gram"]

    def block(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """``G[rows][:, cols]`` for boolean masks of shape (d,)."""
        if "gram" in self._cache:
            G = self._cache["gram"]
            if rows.all() and cols.all():
                return G
            return G[np.ix_(rows, cols)]
        return self.design[:, rows].T @ self.design[:, cols]

    def gram_times(self, b: np.ndarray) -> np.ndarray:
        """``G b`` of shape (d,)."""
        if "gram" in self._cache:
            return self._cache["gram"] @ b
        nz = b != 0
        return self.design.T @ (self.design[:, nz] @ b[nz])

    def inverse(self, keep: np.ndarray) -> np.ndarray | None:
        """Inverse of ``G[keep][:, keep]`` (cached), or None when that block is singular."""
        key = keep.tobytes()
        cached = self._cache.get("inverse")
        if cached is None or cached[0] != key:
            inv = None
            try:
                factor = linalg.cho_factor(self.gram[np.ix_(keep, keep)], check_finite=False)
                inv = linalg.cho_solve(factor, np.eye(int(keep.sum())), check_finite=False)
                inv = inv if np.all(np.isfinite(inv)) else None
            except linalg.LinAlgError:
                pass
            cached = (key, inv)
            self._cache["inverse"] = cached
        return cached[1]

    def unpenalized(self, coef: np.ndarray) -> np.ndarray:
        """Least-squares coefficients ``g`` of shape (q,) (or (q, L)) of the unpenalised columns given ``b``."""
        if self.r.shape[0] == 0:
            return np.zeros((0, *coef.shape[1:]))
        rhs = (self.qtz if coef.ndim == 1 else self.qtz[:, None]) - self.qtx @ coef
        return linalg.solve_triangular(self.r, rhs)

    def gradient(self) -> np.ndarray:
        """``|Xt^T zt| / n`` of shape (d,): the l1 level above which ``b = 0`` solves the problem."""
        return np.abs(self.xty) / self.n


def check_unpenalized_rank(C: np.ndarray, tol: float = 1e-10) -> None:
    """Raise when the unpenalised columns (intercept and covariates) are linearly dependent."""
    if C.shape[1] == 0:
        return
    rdiag = np.abs(np.diag(linalg.qr(C, mode="r")[0]))
    if rdiag.min() <= tol * max(rdiag.max(), 1e-300):
        raise ValueError(
            "The 'unpenalized' covariates are linearly dependent (on each other or on the intercept); "
            "drop the redundant columns."
        )


def working_problem(
    Xs: np.ndarray, C: np.ndarray, z: np.ndarray, w: np.ndarray, reusable: bool = False
) -> WorkingProblem:
    """Build the Gram form of ``1 / (2n) ||sqrt(w) (z - C g - Xs b)||^2``.

    Parameters
    ----------
    Xs : ndarray of shape (n, d)
        Standardised features.
    C : ndarray of shape (n, q)
        Unpenalised columns (intercept first when there is one); q may be 0.
    z : ndarray of shape (n,)
        Working response with the offset already subtracted.
    w : ndarray of shape (n,)
        Non-negative working weights.
    reusable : bool
        See `WorkingProblem`.
    """
    n, d = Xs.shape
    sw = np.sqrt(w)
    unit = bool(np.all(w == 1.0))
    Xw = Xs if unit else Xs * sw[:, None]
    zw = z if unit else z * sw
    if C.shape[1]:
        Q, R = linalg.qr(C if unit else C * sw[:, None], mode="economic")
        qtx = Q.T @ Xw
        qtz = Q.T @ zw
        # Explicit projection rather than G - qtx^T qtx: no cancellation for columns close to span(C).
        Xt = Xw - Q @ qtx
        zt = zw - Q @ qtz
    else:
        R = np.zeros((0, 0))
        qtx, qtz = np.zeros((0, d)), np.zeros(0)
        Xt, zt = Xw, zw
    prob = WorkingProblem(
        xty=Xt.T @ zt,
        yty=float(zt @ zt),
        n=n,
        qtz=qtz,
        qtx=qtx,
        r=R,
        reusable=reusable,
        design=None if reusable else np.asfortranarray(Xt),
    )
    if reusable:
        prob._cache["gram"] = np.ascontiguousarray(Xt.T @ Xt)
    return prob


def _solve_psd(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """``A^+ B`` for a symmetric positive semi-definite ``A``: Cholesky, or a pseudo-inverse if singular."""
    try:
        factor = linalg.cho_factor(A, check_finite=False)
        out = linalg.cho_solve(factor, B, check_finite=False)
        if np.all(np.isfinite(out)):
            return out
    except linalg.LinAlgError:
        pass
    return np.linalg.pinv(A, hermitian=True) @ B


def _profile_free(prob: WorkingProblem, free: np.ndarray, pen: np.ndarray, inv: np.ndarray | None):
    """Profile the unpenalised features U out of the Gram form: ``b_U = G_UU^+ (c_U - G_UP b_P)``.

    Returns the Gram form of the penalised features P (``Gp = G_PP - G_PU G_UU^-1 G_UP``, ``cp``,
    ``yy``) and ``g_u = G_UU^-1 c_U``, ``H = G_UU^-1 G_UP`` to recover ``b_U = g_u - H b_P``.
    ``inv``, when given, is the inverse of ``G`` over ``U | P``. The last result is cached on the
    problem: successive LLA steps often keep both sets and change only the weights.
    """
    key = ("profile", free.tobytes(), pen.tobytes())
    cached = prob._cache.get("profile")
    if cached is not None and cached[0] == key:
        return cached[1]
    c = prob.xty
    if inv is not None:
        # Block inverse: with M^-1 = [[I_UU, I_UP], [I_PU, I_PP]], the Schur complement of G_UU is
        # I_PP^-1 and G_UU^-1 G_UP = -I_UP I_PP^-1; O(|P|^3 + |U| |P|^2) instead of O(|U|^3).
        keep = free | pen
        fu, pp = free[keep], pen[keep]
        I_up = inv[np.ix_(fu, pp)]
        Gp = _solve_psd(inv[np.ix_(pp, pp)], np.eye(int(pp.sum())))
        Gp = 0.5 * (Gp + Gp.T)
        H = -I_up @ Gp
        c_u = c[free]
        g_u = inv[np.ix_(fu, fu)] @ c_u + H @ (I_up.T @ c_u)
    else:
        G_up = prob.block(free, pen)
        sol = _solve_psd(prob.block(free, free), np.column_stack([c[free], G_up]))
        g_u, H = sol[:, 0], sol[:, 1:]
        Gp = prob.block(pen, pen) - G_up.T @ H
    cp = c[pen] - H.T @ c[free]
    yy = prob.yty - float(c[free] @ g_u)
    out = (Gp, cp, yy, g_u, H)
    prob._cache["profile"] = (key, out)
    return out


def coordinate_descent(
    gram: np.ndarray,
    xty: np.ndarray,
    yty: float,
    n: int,
    alphas: np.ndarray,
    l1_ratio: float,
    coef_init: np.ndarray | None,
    tol: float,
    max_iter: int,
) -> tuple[np.ndarray, np.ndarray]:
    """Elastic net in Gram form over decreasing ``alphas`` with scikit-learn's coordinate descent.

    Minimises ``(b^T G b - 2 c^T b + ||y||^2) / (2n) + alpha (l1_ratio |b|_1 + (1 - l1_ratio) |b|^2 / 2)``
    for each alpha, warm-starting each from the last.

    Returns
    -------
    coefs : ndarray of shape (p, len(alphas))
    converged : ndarray of bool of shape (len(alphas),)
    """
    from sklearn.exceptions import ConvergenceWarning  # here: importing sklearn costs a second
    from sklearn.linear_model import enet_path

    p = gram.shape[0]
    # In Gram mode (check_input=False) enet_path reads only the shape of X and the norm of y:
    # a zero-stride view and a one-element y of the right norm stand in for the projected data.
    X_shape = np.broadcast_to(np.zeros((1, 1)), (n, p))
    y_norm = np.array([np.sqrt(max(yty, 0.0))])
    init = None if coef_init is None else np.array(coef_init, dtype=np.float64)  # solved in place
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ConvergenceWarning)
        _, coefs, _, n_iters = enet_path(
            X_shape,
            y_norm,
            l1_ratio=l1_ratio,
            alphas=np.asarray(alphas, dtype=np.float64),
            precompute=gram,
            Xy=np.ascontiguousarray(xty),
            coef_init=init,
            check_input=False,
            tol=tol,
            max_iter=max_iter,
            return_n_iter=True,
        )
    # scikit-learn warns once per alpha left unconverged, which then used all max_iter sweeps.
    converged = np.asarray(n_iters) < max_iter
    if not any(issubclass(c.category, ConvergenceWarning) for c in caught):
        converged[:] = True
    for c in caught:
        if not issubclass(c.category, ConvergenceWarning):
            warnings.warn_explicit(c.message, c.category, c.filename, c.lineno)
    return coefs, converged


def _core(prob, alphas, weights, coef_init, l1_ratio, tol, max_iter, inv=None):
    """Weighted elastic net over ``alphas`` on the features with finite weight (see `weighted_lasso`)."""
    coefs = np.zeros((prob.d, alphas.shape[0]))
    pen = np.isfinite(weights) & (weights > 0)
    free = weights == 0
    if free.any():
        Gp, cp, yy, g_u, H = _profile_free(prob, free, pen, inv)
    else:
        Gp = prob.block(pen, pen)
        cp, yy = prob.xty[pen], prob.yty
    converged = np.ones(alphas.shape[0], dtype=bool)
    if pen.any():
        v = weights[pen]
        if not np.all(v == 1.0):
            Gp = Gp / np.outer(v, v)
            cp = cp / v
        init = None if coef_init is None else coef_init[pen] * v
        bt, converged = coordinate_descent(
            np.ascontiguousarray(Gp), cp, yy, prob.n, alphas, l1_ratio, init, tol, max_iter
        )
        coefs[pen] = bt / v[:, None]
    if free.any():
        coefs[free] = g_u[:, None] - H @ coefs[pen]
    return coefs, converged


def weighted_lasso(
    prob: WorkingProblem,
    alphas: np.ndarray,
    weights: np.ndarray,
    coef_init: np.ndarray | None,
    *,
    l1_ratio: float = 1.0,
    tol: float = 1e-7,
    max_iter: int = 10_000,
) -> tuple[np.ndarray, np.ndarray]:
    """Solve ``min_b (b^T G b - 2 c^T b) / (2n) + alpha sum_j v_j |b_j|`` over decreasing ``alphas``.

    With one alpha the solve is restricted to a working set (the non-zeros of ``coef_init`` and the
    features violating the optimality conditions there), grown until the conditions
    ``|c_j - (G b)_j| / n <= alpha l1_ratio v_j`` hold for every feature left at zero, so the result
    solves the full problem; most features of a sparse path never enter a solve.

    Parameters
    ----------
    prob : WorkingProblem
    alphas : ndarray of shape (L,)
        Decreasing l1 levels.
    weights : ndarray of shape (d,)
        Per-feature weights ``v_j >= 0``; 0 leaves the feature unpenalised, ``inf`` keeps it at zero.
        Must be 0, 1 or inf when ``l1_ratio < 1`` (a ridge part does not rescale with the columns).
    coef_init : ndarray of shape (d,), optional
        Warm start.

    Returns
    -------
    coefs : ndarray of shape (d, L)
    converged : ndarray of bool of shape (L,)
    """
    alphas = np.atleast_1d(np.asarray(alphas, dtype=np.float64))
    weights = np.asarray(weights, dtype=np.float64)
    pen = np.isfinite(weights) & (weights > 0)
    free = weights == 0
    if l1_ratio < 1.0 and not np.all(weights[pen] == 1.0):
        raise ValueError("Per-feature weights other than 0, 1 or inf need l1_ratio = 1.")
    if alphas.shape[0] > 1:
        return _core(prob, alphas, weights, coef_init, l1_ratio, tol, max_iter)
    if prob.reusable and free.sum() > pen.sum():
        # Mostly unpenalised: profile through the inverse Gram over every feature (cached).
        inv = prob.inverse(free | pen)
        if inv is not None:
            return _core(prob, alphas, weights, coef_init, l1_ratio, tol, max_iter, inv)
    b = np.zeros(prob.d) if coef_init is None else np.asarray(coef_init, dtype=np.float64)
    level = alphas[0] * l1_ratio * prob.n * weights
    work = pen & (b != 0)
    for round_ in range(50):
        grad = np.abs(prob.xty - prob.gram_times(b))
        # KKT check with a small slack for the solver's own tolerance.
        violators = pen & ~work & (grad > level * (1.0 + 1e-9))
        if round_ and not violators.any():
            break
        work |= violators
        sub = np.where(pen & ~work, np.inf, weights)
        coefs, converged = _core(prob, alphas, sub, b, l1_ratio, tol, max_iter)
        b = coefs[:, 0]
    return b[:, None], converged


def ridge_gcv(prob: WorkingProblem, n_unpenalized: int, n_grid: int = 60) -> np.ndarray:
    """Ridge solution ``(G + n alpha I)^-1 c`` with alpha chosen by generalised cross-validation.

    GCV(alpha) = RSS(alpha) / (n - q - df(alpha))^2 (Golub, Heath & Wahba 1979, Technometrics 21:215),
    with ``df = sum e_k / (e_k + n alpha)`` over the eigenvalues ``e_k`` of ``G`` and ``q`` unpenalised
    columns. The grid spans ``n alpha`` from 1e-6 to 1e3 times the mean eigenvalue.

    Returns
    -------
    ndarray of shape (d,)
    """
    e, V = linalg.eigh(prob.gram, check_finite=False)
    e = np.maximum(e, 0.0)
    u = V.T @ prob.xty
    scale = max(float(e.mean()), 1e-12)
    levels = scale * np.logspace(-6, 3, n_grid)  # n * alpha
    inv = 1.0 / (e[None, :] + levels[:, None])  # (grid, d)
    df = (e[None, :] * inv).sum(axis=1)
    rss = prob.yty - ((u**2)[None, :] * (2.0 * inv - e[None, :] * inv**2)).sum(axis=1)
    resid_df = prob.n - n_unpenalized - df
    gcv = np.where(resid_df > 0.5, np.maximum(rss, 0.0) / np.maximum(resid_df, 0.5) ** 2, np.inf)
    best = int(np.argmin(gcv))
    return V @ (u * inv[best])
