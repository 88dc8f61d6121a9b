"""Damped Newton iterations for the small null fits (covariates only) of the likelihood kernels."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np


def damped_newton(
    evaluate: Callable[[np.ndarray], tuple[float, np.ndarray, np.ndarray]],
    start: np.ndarray,
    *,
    max_iter: int,
    what: str,
) -> tuple[np.ndarray, tuple[float, np.ndarray, np.ndarray]]:
    """Minimise a smooth convex loss by Newton steps, halving a step until the loss does not rise.

    Parameters
    ----------
    evaluate : callable x -> (loss, g, H)
        The loss at ``x``, minus its gradient (up to a positive factor) and the matching curvature,
        so that the Newton step is ``solve(H, g)``.
    start : ndarray of shape (q,)
    max_iter : int
    what : str
        Name of the fit in error messages.

    Returns
    -------
    x, (loss, g, H) at ``x``
        Stops once a full step's predicted decrease ``g . step`` is below 1e-12 (that step is taken).
    """
    x = start
    current = evaluate(x)
    for _ in range(max_iter):
        loss, g, H = current
        try:
            step = np.linalg.solve(H, g)
        except np.linalg.LinAlgError:
            raise ValueError(
                "the covariates are collinear (or constant) on these samples"
            ) from None
        decrease = float(g @ step)
        t = 1.0
        while True:
            trial = evaluate(x + t * step)
            if np.isfinite(trial[0]) and trial[0] <= loss + 1e-12 * (1 + abs(loss)):
                break
            t *= 0.5
            if t < 1e-10:
                raise ValueError(f"the {what} did not converge")
        x, current = x + t * step, trial
        if decrease < 1e-12:  # that step was well inside the quadratic region: converged
            return x, current
    raise ValueError(f"the {what} did not converge in {max_iter} steps")
