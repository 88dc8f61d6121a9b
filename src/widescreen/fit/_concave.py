"""SCAD and MCP solved directly along the lambda path by coordinate descent.

Breheny & Huang (2011, Ann. Appl. Stat. 5:232): at each lambda, starting from the previous lambda's
solution (warm start), cyclic coordinate descent with the penalty's own one-dimensional minimiser (see
`_cd`) on the quadratic approximation of the loss, inside an iteratively reweighted least-squares loop for
the binomial, Poisson and Cox losses. Unlike the local linear approximation from the lasso path, the
concave penalty acts from the first lambda on, so a feature whose effect shows only once strong features
are in the model (and unpenalised past ``a lambda``) enters then, and not after the noise features a lasso
would admit first.

Each solve works on an active set (the non-zeros, the unpenalised columns and the features the sequential
strong rule of Tibshirani et al. 2012, JRSS-B 74:245, flags) and ends only when the optimality (KKT)
conditions hold for every feature outside it, so the result solves the full problem. A point is flagged
converged when the KKT conditions of the penalised likelihood hold at it (`kkt_violation`).

Guards that end a GLM path before its coefficients run away: the share of the null deviance explained
passing ``max_deviance_ratio`` (separation or saturation), a non-finite linear predictor, IRLS steps
that keep lowering the deviance without settling, or more non-zeros than the samples can support
(``n - q``, the largest support with an unpenalised refit).
"""

from __future__ import annotations

import numpy as np
from scipy import linalg

from . import _cd
from ._penalties import MCP, SCAD, Penalty
from ._problem import Problem
from ._results import SolverOptions


def _kind(pen: Penalty) -> tuple[int, float]:
    if isinstance(pen, SCAD):
        return _cd.SCAD, float(pen.a)
    if isinstance(pen, MCP):
        return _cd.MCP, float(pen.gamma)
    raise ValueError(f"coordinate descent path: unsupported penalty {pen.name!r}")


def _derivative(pen: Penalty, b: np.ndarray, lam: float) -> np.ndarray:
    """``p'_lambda(|b|)`` elementwise (``lambda`` at 0, the subgradient bound)."""
    return pen.lla_weights(np.abs(b), lam) * lam


def kkt_violation(
    problem: Problem, pen: Penalty, b: np.ndarray, eta: np.ndarray, lam: float
) -> float:
    """Largest violation of the optimality conditions of the penalised likelihood at ``b``.

    With ``c_j = x_j^T s / n`` (``s`` the score of the log-likelihood in ``eta``, ``x_j`` standardised),
    a stationary point has ``|c_j| <= lambda`` where ``b_j = 0``, ``c_j = p'_lambda(|b_j|) sign(b_j)``
    where ``b_j != 0`` and ``C^T s / n = 0`` for the unpenalised columns (Fan & Li 2001, Section 3.1).

    Parameters
    ----------
    problem : Problem
    pen : Penalty
    b : ndarray of shape (d,)
        Standardised coefficients.
    eta : ndarray of shape (n,)
        Linear predictor at ``b`` (offset and unpenalised part included).
    lam : float
    """
    z, w = problem.loss.working(problem.y, eta)
    s = w * (z - eta)
    n = problem.n
    c = problem.Xs.T @ s / n
    ok = ~problem.constant
    nz = (b != 0) & ok
    zero = (b == 0) & ok
    viol = 0.0
    if zero.any():
        viol = max(viol, float(np.max(np.abs(c[zero]) - lam)))
    if nz.any():
        viol = max(
            viol, float(np.max(np.abs(c[nz] - _derivative(pen, b[nz], lam) * np.sign(b[nz]))))
        )
    if problem.C.shape[1]:
        viol = max(viol, float(np.max(np.abs(problem.C.T @ s / n))))
    return max(viol, 0.0)


#: IRLS iterations per lambda before a GLM point (binomial, Poisson) that has not settled is taken as
#: running away (the path ends there; R's ``glm.control(maxit = 25)``, common practice). Below saturation
#: a concave working problem settles in a handful; the iterations of a point that does not are the
#: costliest of the path. The Cox loss keeps ``SolverOptions.outer_max_iter``: with strong effects its
#: Newton steps legitimately take longer to settle.
_IRLS_PATIENCE = 25

#: Consecutive failed IRLS iterations of a GLM point before the point is taken as not settling. An
#: iteration fails when its working problem ends unconverged (all ``max_iter`` sweeps spent) or when no
#: halving of its step lowers the penalised objective (the working problem's minimiser is no descent
#: direction, and the next working problem, built at nearly the same point, is nearly the same). On the
#: bench path such a point was always one the path then dropped after ``_IRLS_PATIENCE`` iterations.
_STUCK_SOLVES = 2

#: Coordinate descent sweeps between the first attempts of the Newton polish.
_BURST = 5
#: Polish attempts after bursts of `_BURST` sweeps; after them the bursts double, so a solve spends
#: at most about log2(max_iter / _BURST) more attempts. Where a pattern's quadratic is not convex (a
#: GLM's small working weights under a concave piece) the polish cannot apply and the sweeps finish the
#: solve; where the sweeps converge linearly with a rate near 1 (an ill-conditioned pattern, a path
#: nearing saturation), a later attempt, once the pattern has settled, ends thousands of sweeps early.
_POLISH_TRIES = 3


class _State:
    """The running solution along the path: coefficients ``beta = (b, g)`` and the linear predictor."""

    def __init__(self, problem: Problem, eta0: np.ndarray):
        self.p = problem
        n, d = problem.n, problem.d
        self.d = d
        self.q = problem.C.shape[1]
        # Features and unpenalised columns side by side, column-major for the compiled sweeps.
        self.XC = np.asfortranarray(np.column_stack([problem.Xs, problem.C]))
        self.beta = np.zeros(d + self.q)
        if self.q:
            self.beta[d:] = np.linalg.lstsq(problem.C, eta0 - problem.offset, rcond=None)[0]
        self.eta = eta0.copy()
        self.eligible = ~problem.constant
        self.free_idx = np.arange(d, d + self.q)
        self.n = n
        # The Gaussian working problem never changes: its Gram matrix serves every Newton polish.
        self.gram = self.XC.T @ self.XC / n if problem.loss.quadratic else None
        if self.gram is not None:
            self.gram_diag = np.diag(self.gram).copy()
            z, _ = problem.loss.working(problem.y, eta0)
            self.xtz = self.XC.T @ (z - problem.offset) / n

    def linear_predictor(self, beta: np.ndarray) -> np.ndarray:
        nz = np.flatnonzero(beta)
        return self.p.offset + self.XC[:, nz] @ beta[nz]

    def objective(self, pen: Penalty, beta: np.ndarray, eta: np.ndarray, lam: float) -> float:
        dev = self.p.loss.deviance(self.p.y, eta)
        b = beta[: self.d]
        return dev / (2 * self.n) + float(np.sum(pen.value(b[b != 0], lam)))


def _pieces(t: np.ndarray, lam: float, kind: int, conc: float):
    """Curvature, slope and bounds of the penalty piece holding each ``t = |b| > 0``.

    On a piece the penalty is ``slope t + curv t^2 / 2`` plus a constant (SCAD: slope lambda, curvature 0
    up to lambda; slope ``a lambda / (a - 1)``, curvature ``-1 / (a - 1)`` up to ``a lambda``; flat beyond.
    MCP: slope lambda, curvature ``-1 / gamma`` up to ``gamma lambda``; flat beyond).
    """
    if kind == _cd.SCAD:
        r1, r2 = t <= lam, (t > lam) & (t <= conc * lam)
        slope = np.where(r1, lam, np.where(r2, conc * lam / (conc - 1.0), 0.0))
        curv = np.where(r2, -1.0 / (conc - 1.0), 0.0)
        lo = np.where(r1, 0.0, np.where(r2, lam, conc * lam))
        hi = np.where(r1, lam, np.where(r2, conc * lam, np.inf))
    else:
        r1 = t <= conc * lam
        slope = np.where(r1, lam, 0.0)
        curv = np.where(r1, -1.0 / conc, 0.0)
        lo = np.where(r1, 0.0, conc * lam)
        hi = np.where(r1, conc * lam, np.inf)
    return slope, curv, lo, hi


class _Normal:
    """Normal equations ``X_U^T W X_U / n`` and ``X_U^T W t / n`` of one working problem's columns.

    Shared by the polishes of one round of sweeps, instead of one weighted product per polish round:
    made first for the pattern polished first (often the only one), then, if a later pattern leaves
    it, for every column of the round (``cols``: the sweeps keep the non-zeros among them).
    """

    def __init__(self, st: _State, w: np.ndarray, target: np.ndarray, cols: np.ndarray):
        self.st, self.w, self.target, self.cols = st, w, target, cols
        self.pos = np.full(st.XC.shape[1], -1)
        self.gram = self.rhs = None

    def _make(self, U: np.ndarray) -> None:
        st = self.st
        XU = st.XC[:, U]
        B = XU * np.sqrt(self.w)[:, None]
        self.gram = B.T @ B / st.n  # a symmetric rank-k product: half the work of X^T W X
        self.rhs = XU.T @ (self.w * self.target) / st.n
        self.pos[:] = -1
        self.pos[U] = np.arange(U.size)

    def take(self, U: np.ndarray):
        """``(M, rhs)`` of the columns ``U`` (fresh arrays)."""
        if self.gram is None:
            self._make(U)
        elif np.any(self.pos[U] < 0):
            self._make(np.union1d(self.cols, U) if self.cols is not None else U)
            self.cols = None
        at = self.pos[U]
        return self.gram[np.ix_(at, at)], self.rhs[at]


def _polish(
    st: _State, z, w, r, lam: float, kind: int, conc: float, normal=None, rounds: int = 20
) -> bool:
    """Exact solve on a pattern of zeros, signs and penalty pieces (a Newton step), iterated.

    Within one piece SCAD and MCP are linear or quadratic in ``|b_j|``, so with the zero set, the signs
    and the pieces of the non-zeros fixed the working objective is a quadratic whose minimiser solves
    one linear system. When the solution leaves the pattern (a sign flips, a piece changes), the pattern
    is taken from the solution and the system solved again, as primal-dual active-set methods do for the
    lasso. A solution that stays in its own pattern is kept (``st.beta`` and ``r`` updated in place;
    returns True); the caller still confirms it with a coordinate sweep. ``normal`` (a `_Normal` of
    the working problem) supplies the systems of a GLM's working problem.
    """
    d, n = st.d, st.n
    beta = st.beta
    pen_nz = np.flatnonzero(beta[:d])
    t, sgn = np.abs(beta[pen_nz]), np.sign(beta[pen_nz])
    target = z - st.p.offset  # the working response net of the offset
    for _ in range(rounds):
        U = np.concatenate([pen_nz, st.free_idx])
        if U.size == 0:
            return True
        if st.gram is not None:
            M = st.gram[np.ix_(U, U)]
            rhs = st.xtz[U]
        elif normal is not None:
            M, rhs = normal.take(U)
        else:
            XU = st.XC[:, U]
            M = (XU.T * w) @ XU / n
            rhs = XU.T @ (w * target) / n
        m = pen_nz.size
        slope, curv, lo, hi = _pieces(t, lam, kind, conc)
        M[np.arange(m), np.arange(m)] += curv  # M and rhs are fresh arrays (fancy indexing copies)
        rhs[:m] -= slope * sgn
        try:
            sol = linalg.cho_solve(
                linalg.cho_factor(M, check_finite=False), rhs, check_finite=False
            )
        except linalg.LinAlgError:
            return False
        if not np.all(np.isfinite(sol)):
            return False
        tn = sol[:m] * sgn  # |b| if the sign held
        slack = 1e-12 * (lam + 1.0)
        if np.all(tn > 0) and np.all(tn >= lo - slack) and np.all(tn <= hi + slack):
            new = np.zeros_like(beta)
            new[U] = sol
            delta = new - beta
            moved = np.flatnonzero(delta)
            beta[moved] = new[moved]
            r -= st.XC[:, moved] @ delta[moved]
            return True
        keep = tn > 0
        pen_nz, t, sgn = pen_nz[keep], tn[keep], sgn[keep]
    return False


def _solve_working(st: _State, z, w, active, lam, kind, conc, opts: SolverOptions) -> bool:
    """Coordinate descent on one working problem, growing ``active`` until the KKT conditions hold.

    Sweeps run to a loose tolerance, then a Newton polish (`_polish`) makes the solution exact when the
    pattern has settled; if it has not, the sweeps go on to ``opts.tol``. Returns whether the solve
    converged.
    """
    n, d = st.n, st.d
    r = z - st.eta
    ok = False
    for _ in range(100):
        idx = np.concatenate([np.flatnonzero(active), st.free_idx])
        if st.gram is not None:
            xwx = st.gram_diag[idx]
        else:
            cols = st.XC[:, idx]
            xwx = w @ (cols * cols) / n
        free = idx >= d
        args = (st.XC, r, w, st.beta, idx, xwx, free, lam, kind, conc)
        sweeps_left = opts.max_iter
        burst = _BURST
        tries = 0
        normal = None
        while sweeps_left > 0:
            # A few sweeps settle which coefficients are non-zero and in which piece; the polish
            # then solves that pattern exactly, and one more sweep confirms that no coordinate moves.
            done, change = _cd.sweeps(*args, min(burst, sweeps_left), opts.tol)
            sweeps_left -= done
            if change < opts.tol:
                ok = True
                break
            tries += 1
            if tries > _POLISH_TRIES:
                burst *= 2
            if normal is None and st.gram is None:
                normal = _Normal(st, w, z - st.p.offset, idx)
            if _polish(st, z, w, r, lam, kind, conc, normal):
                done, change = _cd.sweeps(*args, 1, opts.tol)
                sweeps_left -= done
                if change < opts.tol:
                    ok = True
                    break
        # Features outside the active set: at b_j = 0 the condition is |x_j^T W r| / n <= lambda.
        grad = np.abs(st.XC[:, :d].T @ (w * r)) / n
        viol = st.eligible & ~active & (grad > lam * (1.0 + 1e-9))
        if not viol.any():
            break
        active |= viol
    st.eta = z - r
    return ok


def concave_path(
    problem: Problem, pen: Penalty, lam: np.ndarray, eta0: np.ndarray, opts: SolverOptions
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """SCAD / MCP solutions at the decreasing levels ``lam``.

    Returns
    -------
    B : ndarray of shape (L', d)
        Standardised coefficients (L' <= L when a guard ended the path).
    G : ndarray of shape (L', q)
        Coefficients of the unpenalised columns ``C``.
    converged : ndarray of bool of shape (L',)
        Whether the KKT conditions hold at each point to ``opts.kkt_tol * lambda_max``.
    """
    loss, n, d = problem.loss, problem.n, problem.d
    kind, conc = _kind(pen)
    st = _State(problem, eta0)
    q = st.q
    null_dev = loss.deviance(problem.y, eta0)
    max_df = n - q - 1
    B, G, conv = [], [], []
    z, w = loss.working(problem.y, st.eta)
    grad = np.abs(problem.Xs.T @ (w * (z - st.eta))) / n
    lam_prev = float(lam[0])
    kkt_scale = opts.kkt_tol * float(lam[0])
    outer_max = opts.outer_max_iter
    glm = loss.name in ("binomial", "poisson")
    if glm:
        outer_max = min(outer_max, _IRLS_PATIENCE)
    for level in lam:
        level = float(level)
        b = st.beta[:d]
        # Sequential strong rule: a feature far below the level at the previous solution stays out.
        active = st.eligible & ((b != 0) | (grad > 2.0 * level - lam_prev))
        stop = False
        obj = st.objective(pen, st.beta, st.eta, level)
        settled = False
        stuck = 0
        for _ in range(1 if loss.quadratic else outer_max):
            if not loss.quadratic:
                z, w = loss.working(problem.y, st.eta)
            beta_old = st.beta.copy()
            solved = _solve_working(st, z, w, active, level, kind, conc, opts)
            if loss.quadratic:
                settled = True
                break
            if not solved:
                stuck += 1
                if glm and stuck >= _STUCK_SOLVES:
                    # Working problems that exhaust their sweeps one after another: the coefficients
                    # are drifting along a flat direction (a point running away), as `_IRLS_PATIENCE`.
                    break
            st.eta = st.linear_predictor(st.beta)  # exact, free of the sweeps' rounding
            new_obj = st.objective(pen, st.beta, st.eta, level)
            descended = False
            for _ in range(20):  # step halving: the penalised objective must not rise
                if np.isfinite(new_obj) and new_obj <= obj + 1e-12 * abs(obj):
                    descended = True
                    break
                st.beta = 0.5 * (st.beta + beta_old)
                st.eta = st.linear_predictor(st.beta)
                new_obj = st.objective(pen, st.beta, st.eta, level)
            if not np.all(np.isfinite(st.eta)):
                stop = True
                break
            if 1.0 - loss.deviance(problem.y, st.eta) / null_dev > opts.max_deviance_ratio:
                # Saturating (separation in a binary outcome): the point would be dropped below, and
                # its IRLS iterations are the costliest of the path (coefficients running away).
                stop = True
                break
            step = np.abs(st.beta - beta_old).max()
            small = step <= opts.outer_tol * max(1.0, np.abs(st.beta[:d]).max())
            flat = abs(new_obj - obj) <= opts.irls_tol * (abs(new_obj) + 0.1)
            obj = new_obj
            if small or flat:
                settled = True
                break
            if solved and descended:
                stuck = 0
            elif solved:  # every halving raised the objective (see `_STUCK_SOLVES`)
                stuck += 1
                if glm and stuck >= _STUCK_SOLVES:
                    break
        b = st.beta[:d]
        if stop or not np.all(np.isfinite(st.beta)):
            break
        df = int(np.count_nonzero(b))
        if df > max_df:
            break
        if not loss.quadratic:
            ratio = 1.0 - loss.deviance(problem.y, st.eta) / null_dev
            if ratio > opts.max_deviance_ratio or not settled:
                # Saturated or separated (the deviance still falling when IRLS gave up): a criterion
                # would reward the point and its coefficients are running away; end the path before it.
                break
        viol = kkt_violation(problem, pen, b, st.eta, level)
        B.append(b.copy())
        G.append(st.beta[d:].copy())
        conv.append(viol <= kkt_scale)
        z, w = loss.working(problem.y, st.eta)
        grad = np.abs(problem.Xs.T @ (w * (z - st.eta))) / n
        lam_prev = level
    if not B:  # ended at the first level: the null model (every penalised coefficient zero)
        B.append(np.zeros(d))
        G.append(_State(problem, eta0).beta[d:])
        conv.append(False)
    return np.array(B), np.array(G).reshape(len(B), q), np.array(conv, dtype=bool)
