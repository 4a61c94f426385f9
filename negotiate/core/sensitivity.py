"""Solution sensitivities dx*/dp, multiplier derivatives and the Hessian of V, from the KKT system.

Where the certificate is ``smooth`` (LICQ, strict second-order sufficiency, strict complementarity), the
implicit function theorem applied to the KKT equalities on the strictly active set ``S``::

    grad_x L(x, lam, p) = 0,        c_S(x, p) = bound_S

gives, with ``H = d2L/dx2``, ``C = d c_S / dx`` and ``D = d c_S / dp`` (zero rows for simple bounds)::

    [ H   C^T ] [ dx/dp   ]     [ d2L/dx dp ]
    [ C   0   ] [ dlam/dp ] = - [ D         ]

Multipliers of inactive rows stay zero. Differentiating ``dV/dp = partial_p L(x*(p), lam*(p), p)`` once
more gives the value Hessian ``d2V/dp2 = L_pp + L_px dx/dp + (dg/dp)^T dlam_g/dp`` (Fiacco, 1983,
*Introduction to Sensitivity and Stability Analysis in Nonlinear Programming*, Thm. 3.2.2 and its
corollaries).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Sensitivity"]


@dataclass(frozen=True)
class Sensitivity:
    """First-order sensitivities of one agent solution with respect to its parameters.

    Attributes
    ----------
    available : bool
        Whether the certificate allowed them; when ``False`` every array is ``None`` and ``reason`` says
        why (never a wrong number).
    reason : str
        Why the sensitivities are, or are not, available.
    dx_dp : numpy.ndarray or None
        ``d x* / d p``, shape ``(n_x, n_p)``.
    dlam_g_dp, dlam_x_dp : numpy.ndarray or None
        Derivatives of the multipliers (our sign convention), shapes ``(n_g, n_p)`` and ``(n_x, n_p)``.
    value_hessian : numpy.ndarray or None
        ``d2 V / dp2``, shape ``(n_p, n_p)``, symmetric.
    """

    available: bool
    reason: str
    dx_dp: np.ndarray | None = None
    dlam_g_dp: np.ndarray | None = None
    dlam_x_dp: np.ndarray | None = None
    value_hessian: np.ndarray | None = None

    def __bool__(self) -> bool:
        return self.available


def solve_sensitivity(
    H: np.ndarray,
    J: np.ndarray,
    rows: np.ndarray,
    L_px: np.ndarray,
    G_p: np.ndarray,
    L_pp: np.ndarray,
) -> Sensitivity:
    """Solve the KKT sensitivity system on the strictly active rows ``rows`` (g rows first, then x).

    ``H`` (n, n) Hessian of L in x, ``J`` (m, n) Jacobian of g, ``L_px`` (n_p, n) = d/dx partial_p L,
    ``G_p`` (m, n_p) = dg/dp, ``L_pp`` (n_p, n_p).
    """
    n, m, n_p = H.shape[0], J.shape[0], L_pp.shape[0]
    C_all = np.vstack([J, np.eye(n)])
    D_all = np.vstack([G_p, np.zeros((n, n_p))])
    C, D = C_all[rows], D_all[rows]
    k = rows.size
    K = np.block([[H, C.T], [C, np.zeros((k, k))]])
    rhs = -np.vstack([L_px.T, D])
    try:
        sol = np.linalg.solve(K, rhs)
    except np.linalg.LinAlgError:
        return Sensitivity(False, "the KKT matrix is singular at this point")
    dx = sol[:n]
    dlam = np.zeros((m + n, n_p))
    dlam[rows] = sol[n:]
    dlam_g, dlam_x = dlam[:m], dlam[m:]
    hess = L_pp + L_px @ dx + G_p.T @ dlam_g
    hess = 0.5 * (hess + hess.T)
    return Sensitivity(
        True,
        "LICQ, strict SOSC and strict complementarity hold: implicit function theorem applies",
        dx_dp=dx,
        dlam_g_dp=dlam_g,
        dlam_x_dp=dlam_x,
        value_hessian=hess,
    )
