"""Z-vector (orbital-response) equations solved to a stated tolerance (numpy/scipy only).

The excited-state gradient of linear response needs the Lagrange multipliers z (nvir·nocc) of

    (ε_a − ε_i) z_ai + Σ_bj A'_ai,bj z_bj = b_ai                                   (1)

with A' the orbital-response (coupled-perturbed) part of the orbital Hessian, applied by a
matrix-vector product that costs one Fock-like build (docs/theory.md#z-vector-solve).  The matrix
D + A' is symmetric and positive definite at a stable closed-shell reference.  The solve here is a
ladder: preconditioned GMRES (preconditioner D⁻¹, D = ε_a − ε_i), restarted from its own result;
then preconditioned MINRES from the best vector so far; then, for small problems, the dense matrix
built column by column and solved directly.  Every rung is judged by the *true* relative residual
‖(D + A')z − b‖ / ‖b‖ computed here, not by the iteration's own estimate.
"""

from __future__ import annotations

import dataclasses
from typing import Callable

import numpy as np
from scipy.sparse.linalg import LinearOperator, gmres, minres

__all__ = ["ZVectorSolution", "solve_zvector", "DEFAULT_ZVECTOR_TOL", "DENSE_LIMIT"]

#: Relative residual the ladder aims for (dimensionless).
DEFAULT_ZVECTOR_TOL = 1e-10

#: Largest dimension nvir·nocc for which the dense last rung is tried (that many products).
DENSE_LIMIT = 600


@dataclasses.dataclass
class ZVectorSolution:
    """z : (n,) solution; residual : reached relative residual ‖(D + A')z − b‖/‖b‖ (dimensionless);
    solver : the rung that produced z; products : matrix-vector products used; attempts : one
    dict per rung ({"what", "outcome"})."""

    z: np.ndarray
    residual: float
    solver: str
    products: int
    attempts: list


def solve_zvector(apply_response: Callable[[np.ndarray], np.ndarray], diagonal: np.ndarray, rhs: np.ndarray,
                  tol: float = DEFAULT_ZVECTOR_TOL, max_products: int = 400,
                  dense_limit: int = DENSE_LIMIT) -> ZVectorSolution:
    """Solve (diag(D) + A') z = b, equation (1) of the module docstring, to relative residual ``tol``.

    apply_response : z (n,) ↦ A'z (n,), the response product (units of D times z).
    diagonal : (n,) D = ε_a − ε_i in Eh, positive for a closed-shell aufbau reference.
    rhs : (n,) b.  tol : target relative residual.  max_products : budget per iterative rung.
    Returns the best solution found (the smallest true residual over all rungs tried).
    """
    d = np.asarray(diagonal, dtype=float).ravel()
    b = np.asarray(rhs, dtype=float).ravel()
    n = d.size
    if b.size != n:
        raise ValueError(f"rhs has {b.size} elements, diagonal {n}")
    if not (np.isfinite(tol) and tol > 0):
        raise ValueError(f"tol must be a positive number, got {tol}")
    bnorm = float(np.linalg.norm(b))
    if bnorm == 0.0:
        return ZVectorSolution(np.zeros(n), 0.0, "zero right-hand side", 0, [])
    count = [0]

    def op(z):
        count[0] += 1
        z = np.asarray(z, dtype=float).ravel()
        return d * z + np.asarray(apply_response(z), dtype=float).ravel()

    def residual(z) -> float:
        return float(np.linalg.norm(op(z) - b)) / bnorm

    A = LinearOperator((n, n), matvec=op, dtype=float)
    safe = np.where(np.abs(d) > 1e-8, d, np.copysign(1e-8, d + 1e-300))
    M = LinearOperator((n, n), matvec=lambda v: np.asarray(v).ravel() / safe, dtype=float)
    best_z, best_res = b / safe, float("inf")
    attempts: list = []
    solver = ""
    best_res = residual(best_z)
    restart = int(max(1, min(n, 40, max_products)))

    def take(z, name):
        nonlocal best_z, best_res, solver
        if not np.all(np.isfinite(z)):
            attempts.append({"what": name, "outcome": "non-finite result"})
            return
        res = residual(z)
        attempts.append({"what": name, "outcome": f"relative residual {res:.1e} after {count[0]} products"})
        if res < best_res:
            best_z, best_res, solver = z, res, name

    # rung 1: GMRES, restarted from its own result while it keeps improving
    start = count[0]
    for _ in range(4):
        if best_res <= tol or count[0] - start >= max_products:
            break
        before = best_res
        # scipy's stopping test is on its own (preconditioned) residual; aim a little lower
        z, _info = gmres(A, b, x0=best_z, rtol=0.1 * tol, atol=0.0, restart=restart,
                         maxiter=max(1, (max_products - (count[0] - start)) // (restart + 1)), M=M)
        take(np.asarray(z), "GMRES (preconditioned by 1/(ε_a − ε_i))")
        if not best_res < 0.5 * before:
            break
    # rung 2: MINRES (symmetric operator) from the best vector so far
    if best_res > tol:
        z, _info = minres(A, b, x0=best_z, rtol=0.1 * tol, maxiter=max_products, M=M)
        take(np.asarray(z), "MINRES (preconditioned by 1/(ε_a − ε_i))")
    # rung 3: dense direct solve for small problems
    if best_res > tol and n <= dense_limit:
        cols = np.empty((n, n))
        eye = np.eye(n)
        for k in range(n):
            cols[:, k] = op(eye[k])
        try:
            z = np.linalg.solve(cols, b)
            take(z, "dense direct solve")
        except np.linalg.LinAlgError as err:
            attempts.append({"what": "dense direct solve", "outcome": f"singular ({err})"})
    return ZVectorSolution(best_z, best_res, solver or "preconditioner only", count[0], attempts)
