"""One point of a least-squares problem: weighted residuals, their Jacobian and the
convergence measures the polishing steps and the noise-level iteration judge progress by."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

EPS = np.finfo(float).eps
NEGLIGIBLE_STEP = 1e-9  # polishing stops once no value would move by this fraction of its std. error


@dataclass
class Point:
    """Residuals, Jacobian and the derived convergence measures at one free vector."""

    x: np.ndarray
    r: np.ndarray
    J: np.ndarray
    sse: float
    offset: float  # relative offset ||P_J r|| / ||r|| (0 at a stationary point)
    gn_step: np.ndarray
    se: np.ndarray  # s * sqrt(diag((J^T J)^-1)), s^2 = SSE/(n - p): each value's uncertainty

    def step_is_negligible(self) -> bool:
        """The Gauss-Newton step moves no value by more than NEGLIGIBLE_STEP of its standard
        error: further digits are below what the data (or the integration tolerance of a
        dynamic model) can mean."""
        return step_in_standard_errors(self.gn_step, self.se) < NEGLIGIBLE_STEP


def step_in_standard_errors(step: np.ndarray, se: np.ndarray) -> float:
    """The largest |step_j| / se_j (components with step 0 count 0); inf where a moving
    component has no finite, positive standard error."""
    step = np.asarray(step, float)
    moving = step != 0
    if not moving.any():
        return 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.abs(step[moving]) / se[moving]
    return float(ratio.max()) if np.all(np.isfinite(ratio)) else float("inf")


def point_from(x: np.ndarray, r: np.ndarray, J: np.ndarray) -> Point | None:
    """The point at ``x`` from its weighted residuals and Jacobian (None if the SVD fails)."""
    scale = np.linalg.norm(J, axis=0)
    scale[scale == 0] = 1.0
    try:
        U, s, Vt = np.linalg.svd(J / scale, full_matrices=False)
    except np.linalg.LinAlgError:
        return None
    keep = s > s.max(initial=0.0) * max(J.shape) * EPS
    ur = U[:, keep].T @ r
    norm_r = float(np.linalg.norm(r))
    offset = float(np.linalg.norm(ur) / norm_r) if norm_r > 0 else 0.0
    step = -(Vt[keep].T @ (ur / s[keep])) / scale
    dof = max(r.size - x.size, 1)
    # the residual scale enters: the weights may still be provisional (sigma = 1 before the
    # first reweighting), and the step is judged against the uncertainty the data imply
    se = np.sqrt(np.sum((Vt[keep] / s[keep, None]) ** 2, axis=0)) / scale * np.sqrt(float(r @ r) / dof)
    return Point(x, r, J, float(r @ r), offset, step, se)


def evaluate(problem, x: np.ndarray, sigmas: np.ndarray) -> Point | None:
    """The point at ``x`` with residuals weighted by ``sigmas`` (one per output), or None
    where the model fails there."""
    r = problem.residuals(x, sigmas)
    if not np.all(np.isfinite(r)):
        return None
    J = problem.jacobian(x, sigmas)
    if not np.all(np.isfinite(J)):
        return None
    return point_from(x, r, J)
