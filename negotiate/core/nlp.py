"""One agent's parametric NLP: built once, solved many times, each solve certified.

``ParametricNLP`` wraps the problem ::

    V(p) = min_x f(x, p)   s.t.  lbg <= g(x, p) <= ubg,   lbx <= x <= ubx

written with CasADi symbols. Construction builds and compiles, once, the IPOPT solver (a cold and a
warm-started instance) and the functions that evaluate the Lagrangian's gradient, Jacobian and Hessian.
Each :meth:`ParametricNLP.solve` then returns a :class:`LocalResult`: the value, the primal point, all
multipliers, the value gradient ``dV/dp = partial_p L`` at the KKT point (one solve, no finite
differences) and a :class:`~negotiate.core.kkt.Certificate` saying whether that gradient can be trusted. See
:mod:`negotiate.core.kkt` for the sign convention (``L = f + lam_g^T g + lam_x^T x``, CasADi's).
"""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import casadi as ca
import numpy as np
from threadpoolctl import ThreadpoolController

from negotiate.core.kkt import (
    Bounds,
    Certificate,
    ConstraintRef,
    Point,
    Tolerances,
    active_rows,
    certify,
    near_active_count,
    polish,
)
from negotiate.core.sensitivity import Sensitivity, solve_sensitivity
from negotiate.core.status import SOLUTION_PRESENT, Status, from_ipopt

__all__ = ["LocalResult", "ParametricNLP", "screen_result", "try_solve"]

_IPOPT_QUIET = {"ipopt.print_level": 0, "ipopt.sb": "yes", "print_time": False}
_IPOPT_WARM = {
    "ipopt.warm_start_init_point": "yes",
    "ipopt.warm_start_bound_push": 1e-8,
    "ipopt.warm_start_bound_frac": 1e-8,
    "ipopt.warm_start_slack_bound_push": 1e-8,
    "ipopt.warm_start_slack_bound_frac": 1e-8,
    "ipopt.warm_start_mult_bound_push": 1e-8,
    "ipopt.mu_init": 1e-5,
}


@dataclass(frozen=True)
class LocalResult:
    """Outcome of one agent solve at parameter ``p``.

    Attributes
    ----------
    p : numpy.ndarray
        The parameter vector solved for.
    value : float
        Optimal value ``V(p)`` (``nan`` when no point was found).
    gradient : numpy.ndarray or None
        ``dV/dp = partial_p L`` at the KKT point, so that ``V(p + d) ~ V(p) + gradient @ d``. ``None``
        unless ``status`` is ``converged``: a failed solve never yields a number. A converged result's value
        and gradient are finite (a solve whose value or gradient is not, e.g. a cost ``sqrt(p)`` at
        ``p = 0``, is ``failed``, its message naming the quantity).
    x : numpy.ndarray
        Primal point (polished when the polish was accepted).
    lam_g, lam_x : numpy.ndarray
        Multipliers of the rows of g and of the simple bounds (positive: upper bound active).
    g : numpy.ndarray
        Constraint values at ``x``.
    status : Status
        Mapped outcome; ``message`` keeps the solver's own words (and our re-check's, if it downgraded).
    iterations : int
        Solver iterations.
    solve_time : float
        Wall time of the solver call, s.
    certify_time : float
        Wall time of polishing, certificate and gradient, s.
    certificate : Certificate or None
        The KKT certificate (``None`` when the solver found no point worth certifying).
    """

    p: np.ndarray
    value: float
    gradient: np.ndarray | None
    x: np.ndarray
    lam_g: np.ndarray
    lam_x: np.ndarray
    g: np.ndarray
    status: Status
    message: str
    iterations: int
    solve_time: float
    certify_time: float
    certificate: Certificate | None
    _problem: ParametricNLP | None = field(default=None, repr=False, compare=False)

    def __getstate__(self) -> dict[str, Any]:
        # A result travels between processes (worker replies, checkpoints) without its problem: the CasADi
        # solvers stay where they were built. An unpickled result's ``sensitivity()`` says it is detached.
        return {**self.__dict__, "_problem": None}

    @property
    def success(self) -> bool:
        """Whether the point is a certified-converged KKT point (a gradient is present)."""
        return self.status in SOLUTION_PRESENT

    @classmethod
    def failure(cls, problem: ParametricNLP, p: Any, message: str, status: Status = Status.FAILED) -> LocalResult:
        """A result without a point (value, primal point and multipliers NaN) saying why: ``message``."""
        n_x, n_g = int(getattr(problem, "n_x", 0)), int(getattr(problem, "n_g", 0))
        nan_x, nan_g = np.full(n_x, np.nan), np.full(n_g, np.nan)
        p = np.asarray(p, dtype=float).ravel()
        return cls(
            p, np.nan, None, nan_x, nan_g, nan_x.copy(), nan_g.copy(), status, message, 0, 0.0, 0.0, None, problem
        )  # fmt: skip

    def sensitivity(self) -> Sensitivity:
        """dx*/dp, multiplier derivatives and the Hessian of V, where the certificate allows them."""
        if self._problem is None:
            return Sensitivity(False, "this result is not attached to its problem")
        return self._problem.sensitivity(self)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dictionary (arrays as lists, the certificate as its summary fields)."""
        cert = self.certificate
        return {
            "p": self.p.tolist(),
            "value": None if not np.isfinite(self.value) else float(self.value),
            "gradient": None if self.gradient is None else self.gradient.tolist(),
            "x": self.x.tolist(),
            "lam_g": self.lam_g.tolist(),
            "lam_x": self.lam_x.tolist(),
            "status": str(self.status),
            "message": self.message,
            "iterations": self.iterations,
            "solve_time": self.solve_time,
            "certify_time": self.certify_time,
            "certificate": None
            if cert is None
            else {
                "verdict": cert.verdict,
                "reason": cert.reason,
                "licq": cert.licq,
                "sosc": cert.sosc,
                "sosc_eigenvalue": cert.sosc_eigenvalue,
                "weakly_active": [str(r) for r in cert.weakly_active],
                "active": [str(r) for r in cert.active],
                "stationarity": cert.stationarity,
                "feasibility": cert.feasibility,
                "complementarity": cert.complementarity,
            },
        }


_THREADS: ThreadpoolController | None = None


def _one_blas_thread() -> Any:
    """Run the small dense linear algebra of a certificate on one BLAS thread.

    These matrices have a few hundred rows; a multi-threaded BLAS spends more time waking threads than
    computing, and on a 2-core machine shared with IPOPT it can be ten times slower.
    """
    global _THREADS
    if _THREADS is None:
        _THREADS = ThreadpoolController()
    return _THREADS.limit(limits=1, user_api="blas")


class _Evaluator:
    """Fast repeated evaluation of a CasADi Function into NumPy arrays (zero-copy buffers).

    Matrix outputs come back dense; their nonzeros are scattered through index arrays computed once.
    """

    def __init__(self, fn: ca.Function, vectors: Sequence[int] = ()) -> None:
        self.fn = fn
        self._vectors = set(vectors)
        self._ins = [np.zeros(fn.nnz_in(i)) for i in range(fn.n_in())]
        self._nz = [np.zeros(fn.nnz_out(i)) for i in range(fn.n_out())]
        self._buf, self._trigger = fn.buffer()
        # CasADi's stub lists the buffer's byte size as an argument; the wrapper takes it from the buffer itself
        # (and refuses a third argument).
        for i, a in enumerate(self._ins):
            self._buf.set_arg(i, a.data)  # type: ignore[call-arg]
        for i, o in enumerate(self._nz):
            self._buf.set_res(i, o.data)  # type: ignore[call-arg]
        self._layout = []
        for i in range(fn.n_out()):
            sp = fn.sparsity_out(i)
            colind, row = (np.asarray(v, dtype=int) for v in sp.get_ccs())
            col = np.repeat(np.arange(sp.size2()), np.diff(colind))
            self._layout.append((sp.shape, sp.is_dense(), row, col))

    def __call__(self, *args: np.ndarray) -> list[np.ndarray]:
        for buf, a in zip(self._ins, args, strict=True):
            buf[:] = np.ravel(a)
        self._trigger()
        out = []
        for i, (nz, (shape, dense, row, col)) in enumerate(zip(self._nz, self._layout, strict=True)):
            if dense:
                full = nz.reshape(shape[1], shape[0]).T.copy()
            else:
                full = np.zeros(shape)
                full[row, col] = nz
            out.append(full.ravel() if i in self._vectors else full)
        return out


def _vector(name: str, value: Any, size: int, default: float) -> np.ndarray:
    if value is None:
        return np.full(size, default, dtype=float)
    arr = np.asarray(ca.DM(value).full() if isinstance(value, ca.DM) else value, dtype=float).ravel()
    if arr.size == 1 and size != 1:
        arr = np.full(size, float(arr[0]))
    if arr.shape != (size,):
        raise ValueError(f"'{name}' must have shape ({size},) or be a scalar, got shape {arr.shape}")
    if np.isnan(arr).any():
        raise ValueError(f"'{name}' must not contain NaN")
    return arr


def _names(name: str, given: Sequence[str] | None, size: int, stem: str) -> tuple[str, ...]:
    if given is None:
        return tuple(f"{stem}[{i}]" for i in range(size))
    names = tuple(str(s) for s in given)
    if len(names) != size:
        raise ValueError(f"'{name}' must have {size} entries, got {len(names)}")
    return names


def _column(name: str, expr: Any) -> Any:
    if not isinstance(expr, ca.SX | ca.MX):
        raise TypeError(f"'{name}' must be a CasADi SX or MX expression, got {type(expr).__name__}")
    if expr.numel() > 0 and expr.size2() != 1:
        raise ValueError(f"'{name}' must be a column vector, got shape {expr.shape}")
    return expr


class ParametricNLP:
    """A parametric NLP built once and solved for many parameter values, with certified value gradients.

    Parameters
    ----------
    nlp : mapping
        ``{"x": x, "p": p, "f": f, "g": g}`` with CasADi SX or MX symbols ``x`` (decision variables,
        column) and ``p`` (shared parameters, column), scalar expression ``f`` and column expression
        ``g`` (optional), exactly as for ``casadi.nlpsol``.
    lbx, ubx, lbg, ubg : array_like, optional
        Numeric bounds (scalars broadcast); unbounded where omitted. Bounds cannot depend on ``p``:
        **a parameter that should move a bound must be written into g** (e.g. ``g = x_T - p`` with
        ``lbg = ubg = 0`` instead of ``lbx = p``), so that its price shows up in ``dV/dp``.
    x0 : array_like, optional
        Default initial guess for cold solves (zeros when omitted).
    x_names, g_names, p_names : sequence of str, optional
        Names of the entries, used in certificates and error messages.
    solver_options : mapping, optional
        Extra options for ``casadi.nlpsol(..., "ipopt", options)``, e.g. ``{"ipopt.tol": 1e-10}``.
    tolerances : Tolerances, optional
        Thresholds used to read the KKT point (see :class:`negotiate.core.kkt.Tolerances`).
    continuation : bool
        With a smooth warm start (and no constraint held or released), first try Newton's method on the
        warm point's active set at the new parameters; the answer is kept only if it certifies smooth with
        the same strictly active set, else IPOPT solves as usual (default True; its ``iterations`` are 0 and
        its message says so).
    name : str
        Name of the problem (solver and function names).

    Notes
    -----
    An instance is not thread-safe (neither is the CasADi solver inside it): give each thread or worker
    process its own instance.

    Examples
    --------
    >>> import casadi as ca
    >>> x, p = ca.SX.sym("x"), ca.SX.sym("p")
    >>> prob = ParametricNLP({"x": x, "p": p, "f": (x - p) ** 2 + x, "g": x}, ubg=0)
    >>> res = prob.solve([1.0])
    >>> round(res.value, 6), res.gradient.round(6).tolist(), res.certificate.verdict
    (1.0, [2.0], 'smooth')
    """

    def __init__(
        self,
        nlp: Mapping[str, Any],
        lbx: Any = None,
        ubx: Any = None,
        lbg: Any = None,
        ubg: Any = None,
        *,
        x0: Any = None,
        x_names: Sequence[str] | None = None,
        g_names: Sequence[str] | None = None,
        p_names: Sequence[str] | None = None,
        solver_options: Mapping[str, Any] | None = None,
        tolerances: Tolerances | None = None,
        continuation: bool = True,
        name: str = "nlp",
    ) -> None:
        if not isinstance(nlp, Mapping):
            raise TypeError(f"'nlp' must be a dict with keys 'x', 'p', 'f', 'g', got {type(nlp).__name__}")
        unknown = set(nlp) - {"x", "p", "f", "g"}
        if unknown:
            raise ValueError(f"'nlp' has unknown keys {sorted(unknown)}; expected 'x', 'p', 'f', 'g'")
        for key in ("x", "p", "f"):
            if key not in nlp:
                raise ValueError(f"'nlp' must have key '{key}'")
        x = _column("x", nlp["x"])
        p = _column("p", nlp["p"])
        f = nlp["f"]
        sym = type(x)
        if type(p) is not sym:
            raise TypeError(f"'x' and 'p' must be of the same CasADi type, got {sym.__name__} and {type(p).__name__}")
        if not x.is_valid_input() or not p.is_valid_input():
            raise ValueError("'x' and 'p' must be purely symbolic (made with SX.sym / MX.sym and vertcat)")
        f = sym(f) if not isinstance(f, ca.SX | ca.MX) else f
        if f.numel() != 1:
            raise ValueError(f"'f' must be scalar, got shape {f.shape}")
        g = nlp.get("g")
        g = sym(0, 1) if g is None else _column("g", sym(g) if not isinstance(g, ca.SX | ca.MX) else g)

        self.name = str(name)
        self.n_x, self.n_p, self.n_g = int(x.numel()), int(p.numel()), int(g.numel())
        self.lbx = _vector("lbx", lbx, self.n_x, -np.inf)
        self.ubx = _vector("ubx", ubx, self.n_x, np.inf)
        self.lbg = _vector("lbg", lbg, self.n_g, -np.inf)
        self.ubg = _vector("ubg", ubg, self.n_g, np.inf)
        for lo, up, what in ((self.lbx, self.ubx, "x"), (self.lbg, self.ubg, "g")):
            bad = np.flatnonzero(lo > up)
            if bad.size:
                i = int(bad[0])
                raise ValueError(f"lb{what}[{i}] = {lo[i]} exceeds ub{what}[{i}] = {up[i]}")
        self.x0 = _vector("x0", x0, self.n_x, 0.0)
        self.x_names = _names("x_names", x_names, self.n_x, "x")
        self.g_names = _names("g_names", g_names, self.n_g, "g")
        self.p_names = _names("p_names", p_names, self.n_p, "p")
        self.tolerances = tolerances or Tolerances()
        self.continuation = bool(continuation)
        self._bounds = Bounds(
            np.concatenate([self.lbg, self.lbx]),
            np.concatenate([self.ubg, self.ubx]),
            self.g_names + self.x_names,
            self.n_g,
        )

        options = dict(_IPOPT_QUIET)
        options.update(solver_options or {})
        problem = {"x": x, "p": p, "f": f, "g": g}
        expand = sym is ca.MX and "expand" not in options
        self._solver = self._nlpsol(problem, options, expand)
        self._warm_solver: Any = None
        self._warm_options = {**_IPOPT_WARM, **options}
        self._problem_expr = problem
        self._expand = expand
        self._objective: ca.Function | None = None

        lam = sym.sym("lam_g", self.n_g)
        L = f + ca.dot(lam, g) if self.n_g else f
        grad_f = ca.gradient(f, x)
        J = ca.jacobian(g, x)
        H = ca.hessian(L, x)[0]
        grad_p = ca.gradient(L, p) if self.n_p else sym(0, 1)
        mx = sym is ca.MX
        self._eval = _Evaluator(self._function("kkt", [x, p, lam], [f, g, grad_f, J, H, grad_p], mx), (0, 1, 2, 5))
        self._hess = _Evaluator(self._function("hess", [x, p, lam], [H], mx))
        L_px = ca.jacobian(grad_p, x)
        G_p = ca.jacobian(g, p)
        L_pp = ca.jacobian(grad_p, p)
        self._cross = _Evaluator(self._function("cross", [x, p, lam], [L_px, G_p, L_pp], mx))

    @property
    def x_symbol(self) -> Any:
        """The CasADi decision-variable symbol ``x`` (for building larger problems, e.g. a centralized one)."""
        return self._problem_expr["x"]

    @property
    def p_symbol(self) -> Any:
        """The CasADi parameter symbol ``p``."""
        return self._problem_expr["p"]

    @property
    def f_expr(self) -> Any:
        """The cost expression ``f(x, p)``."""
        return self._problem_expr["f"]

    @property
    def g_expr(self) -> Any:
        """The constraint expression ``g(x, p)``."""
        return self._problem_expr["g"]

    def objective(self, x: Any, p: Any) -> float:
        """Evaluate the cost ``f(x, p)`` at a given primal point (no solve)."""
        if self._objective is None:
            self._objective = ca.Function(f"{self.name}_f", [self.x_symbol, self.p_symbol], [self.f_expr])
        return float(self._objective(np.asarray(x, dtype=float), np.asarray(p, dtype=float)))

    def warm_solver(self) -> Any:
        """The IPOPT instance for warm-started solves, made on first use and kept (an executor makes it ahead
        of the first round, where it costs about as much as a solve or two)."""
        if self._warm_solver is None:
            self._warm_solver = self._nlpsol(self._problem_expr, self._warm_options, self._expand)
        return self._warm_solver

    def _nlpsol(self, problem: dict[str, Any], options: dict[str, Any], expand: bool) -> Any:
        if expand:
            try:
                return ca.nlpsol(self.name, "ipopt", problem, {**options, "expand": True})
            except RuntimeError:
                pass  # not expandable to SX (e.g. it calls external functions): keep MX
        return ca.nlpsol(self.name, "ipopt", problem, options)

    def _function(self, tag: str, ins: list[Any], outs: list[Any], expand: bool) -> ca.Function:
        fn = ca.Function(f"{self.name}_{tag}", ins, outs)
        if expand:
            try:
                fn = fn.expand()
            except RuntimeError:
                pass
        return fn

    # ----------------------------------------------------------------------------------------------
    @classmethod
    def from_opti(cls, opti: ca.Opti, **kwargs: Any) -> ParametricNLP:
        """Build from a ``casadi.Opti`` problem whose ``opti.parameter()``s are the shared parameters.

        Opti keeps parameter-dependent bounds (``opti.subject_to(x <= p)``) in ``lbg``/``ubg``; those rows
        are rewritten into ``g`` (``g - bound``, bounded by 0) so that the parameter's price appears in
        dV/dp. A two-sided row whose bounds depend on ``p`` becomes two rows. The initial guess comes
        from ``opti.set_initial``. Keyword arguments go to :class:`ParametricNLP`.
        """
        x, p, f, g = opti.x, opti.p, opti.f, opti.g
        lbg, ubg = opti.lbg, opti.ubg
        rows, lo, up = [], [], []
        for i in range(g.numel()):
            gi, li, ui = g[i], lbg[i], ubg[i]
            l_const, u_const = not ca.depends_on(li, p), not ca.depends_on(ui, p)
            lv = float(ca.evalf(li)) if l_const else None
            uv = float(ca.evalf(ui)) if u_const else None
            if l_const and u_const:
                rows.append(gi)
                lo.append(lv)
                up.append(uv)
            elif not l_const and not u_const and ca.is_equal(li, ui, 10):
                rows.append(gi - li)
                lo.append(0.0)
                up.append(0.0)
            else:
                if l_const and lv is not None and np.isfinite(lv):
                    rows.append(gi)
                    lo.append(lv)
                    up.append(np.inf)
                elif not l_const:
                    rows.append(gi - li)
                    lo.append(0.0)
                    up.append(np.inf)
                if u_const and uv is not None and np.isfinite(uv):
                    rows.append(gi)
                    lo.append(-np.inf)
                    up.append(uv)
                elif not u_const:
                    rows.append(gi - ui)
                    lo.append(-np.inf)
                    up.append(0.0)
        g_new = ca.vertcat(*rows) if rows else ca.MX(0, 1)
        x0 = np.asarray(opti.value(x, opti.initial()), dtype=float).ravel() if x.numel() else None
        kwargs.setdefault("x0", x0)
        return cls({"x": x, "p": p, "f": f, "g": g_new}, lbg=lo, ubg=up, **kwargs)

    # ----------------------------------------------------------------------------------------------
    def _check_p(self, p: Any) -> np.ndarray:
        arr = np.asarray(p, dtype=float)
        if arr.ndim > 1 or arr.size != self.n_p:
            raise ValueError(f"'p' must have shape ({self.n_p},), got {arr.shape}")
        arr = arr.ravel()
        if not np.all(np.isfinite(arr)):
            bad = [self.p_names[i] for i in np.flatnonzero(~np.isfinite(arr))]
            raise ValueError(f"'p' must be finite, got non-finite entries {bad}")
        return arr

    def _point(self, x: np.ndarray, p: np.ndarray, lam_g: np.ndarray, lam_x: np.ndarray) -> Point:
        f, g, gf, J, H, gp = self._eval(x, p, lam_g)
        return Point(
            x=np.asarray(x, dtype=float),
            lam_g=np.asarray(lam_g, dtype=float),
            lam_x=np.asarray(lam_x, dtype=float),
            f=float(f[0]),
            g=g,
            grad_f=gf,
            J=J,
            H=H,
            grad_p=gp,
        )

    def _modified_bounds(
        self, hold: Sequence[ConstraintRef], release: Sequence[ConstraintRef]
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, Bounds]:
        lbx, ubx, lbg, ubg = self.lbx.copy(), self.ubx.copy(), self.lbg.copy(), self.ubg.copy()
        for ref, held in [(r, True) for r in hold] + [(r, False) for r in release]:
            lo, up = (lbg, ubg) if ref.kind == "g" else (lbx, ubx)
            i = ref.index
            if ref.side == "upper":
                if held:
                    lo[i] = up[i]
                else:
                    up[i] = np.inf
            elif ref.side == "lower":
                if held:
                    up[i] = lo[i]
                else:
                    lo[i] = -np.inf
        bounds = Bounds(np.concatenate([lbg, lbx]), np.concatenate([ubg, ubx]), self._bounds.names, self.n_g)
        return lbx, ubx, lbg, ubg, bounds

    def solve(
        self,
        p: Any,
        warm: LocalResult | None = None,
        *,
        hold: Sequence[ConstraintRef] = (),
        release: Sequence[ConstraintRef] = (),
    ) -> LocalResult:
        """Solve at parameter ``p`` and certify the result.

        Parameters
        ----------
        p : array_like, shape (n_p,)
            Parameter values (finite).
        warm : LocalResult, optional
            A previous result (usually at a nearby ``p``) whose primal point and multipliers start the
            solver (IPOPT warm start).
        hold, release : sequence of ConstraintRef, optional
            Constraint sides to hold active (turned into an equality at that bound) or to release (that
            bound removed) for this solve only. Solving both ways at a weakly active constraint gives the
            one-sided value gradients on either side of a kink.

        Returns
        -------
        LocalResult
            ``gradient`` is ``None`` unless the status is ``converged``.
        """
        p = self._check_p(p)
        if hold or release:
            lbx, ubx, lbg, ubg, bounds = self._modified_bounds(hold, release)
        else:
            lbx, ubx, lbg, ubg, bounds = self.lbx, self.ubx, self.lbg, self.ubg, self._bounds
        if warm is not None and self.continuation and not (hold or release):
            cont = self._continue(p, warm)
            if cont is not None:
                return cont
        if warm is not None:
            solver = self.warm_solver()
            start = {"x0": warm.x, "lam_x0": warm.lam_x, "lam_g0": warm.lam_g}
        else:
            solver, start = self._solver, {"x0": self.x0}
        t0 = time.perf_counter()
        try:
            out = solver(p=p, lbx=lbx, ubx=ubx, lbg=lbg, ubg=ubg, **start)
            stats = solver.stats()
            raw = str(stats.get("return_status", "unknown"))
        except RuntimeError as exc:  # evaluation errors surface as exceptions in some CasADi paths
            return replace(LocalResult.failure(self, p, f"solver raised: {exc}"), solve_time=time.perf_counter() - t0)
        solve_time = time.perf_counter() - t0
        status = from_ipopt(raw)
        iterations = int(stats.get("iter_count", 0))
        x = np.asarray(out["x"]).ravel()
        lam_g = np.asarray(out["lam_g"]).ravel()
        lam_x = np.asarray(out["lam_x"]).ravel()
        if status not in (Status.CONVERGED, Status.INACCURATE) or not np.all(np.isfinite(x)):
            g = np.asarray(out["g"]).ravel()
            value = float(out["f"])
            message = raw
            if status in (Status.CONVERGED, Status.INACCURATE):  # a point that is not a number is no point
                status, message = Status.FAILED, f"{raw}; re-check failed: {_not_finite('x', x, self.x_names)}"
            return LocalResult(
                p, value, None, x, lam_g, lam_x, g, status, message, iterations, solve_time, 0.0, None, self
            )  # fmt: skip

        t1 = time.perf_counter()
        tol = self.tolerances
        pt = self._point(x, p, lam_g, lam_x)

        def evaluate(xx: np.ndarray, lg: np.ndarray, lx: np.ndarray) -> Point:
            return self._point(xx, p, lg, lx)

        with _one_blas_thread():
            pt, accepted = polish(pt, bounds, evaluate, tol)
            cert = certify(
                pt,
                bounds,
                tol,
                polished=accepted,
                hessian_at=lambda xx: self._hess(xx, p, pt.lam_g)[0],
                cross_derivative=lambda: self._cross(pt.x, p, pt.lam_g)[0],
            )
        message = raw
        # Written so that a NaN residual fails the re-check too.
        if status is Status.CONVERGED and not (
            cert.stationarity <= tol.stationarity and cert.feasibility <= tol.feasibility
        ):
            status = Status.INACCURATE
            message = (
                f"{raw}; re-check failed: stationarity {cert.stationarity:.2e} (tolerance {tol.stationarity:.0e}), "
                f"feasibility {cert.feasibility:.2e} (tolerance {tol.feasibility:.0e})"
            )
        gradient = pt.grad_p.copy() if status is Status.CONVERGED else None
        certify_time = time.perf_counter() - t1
        result = LocalResult(
            p,
            pt.f,
            gradient,
            pt.x,
            pt.lam_g,
            pt.lam_x,
            pt.g,
            status,
            message,
            iterations,
            solve_time,
            certify_time,
            cert,
            self,
        )
        return _screened(result)

    def _continue(self, p: np.ndarray, warm: LocalResult) -> LocalResult | None:
        """Continuation of a smooth warm start: Newton's method on the KKT equalities of the warm point's
        active set at the new ``p``, from its primal point and multipliers (the corrector of a parametric
        continuation, cf. Guddat, Guerra Vazquez & Jongen 1990, *Parametric Optimization: Singularities,
        Pathfollowing and Jumps*, Wiley -- cited from memory). Kept only when the result is certified like a solver's
        answer would be -- residuals within the re-check tolerances, no violated row, no wrong-signed
        multiplier, verdict ``smooth`` (so a strict local minimum) -- otherwise ``None`` and IPOPT solves.
        Where the active set does not change between rounds, this costs a few linear solves instead of an
        interior-point run."""
        cert0 = warm.certificate
        if not warm.success or cert0 is None or cert0.verdict != "smooth" or warm.p.shape != p.shape:
            return None
        t0 = time.perf_counter()
        tol = self.tolerances
        try:
            start = self._point(warm.x, p, warm.lam_g, warm.lam_x)

            def evaluate(xx: np.ndarray, lg: np.ndarray, lx: np.ndarray) -> Point:
                return self._point(xx, p, lg, lx)

            with _one_blas_thread():
                pt, accepted = polish(start, self._bounds, evaluate, tol, max_newton=6)
                if not accepted or not np.all(np.isfinite(pt.x)):
                    return None
                cert = certify(
                    pt,
                    self._bounds,
                    tol,
                    polished=True,
                    hessian_at=lambda xx: self._hess(xx, p, pt.lam_g)[0],
                    cross_derivative=lambda: self._cross(pt.x, p, pt.lam_g)[0],
                )
        except (RuntimeError, np.linalg.LinAlgError, ValueError):  # evaluation failed far from the warm point
            return None
        ok = (
            cert.verdict == "smooth"
            and np.isfinite(pt.f)
            and bool(np.all(np.isfinite(pt.grad_p)))
            and cert.stationarity <= tol.stationarity
            and cert.feasibility <= tol.feasibility
            and {str(r) for r in cert.strictly_active} == {str(r) for r in cert0.strictly_active}
            # A row close to its bound (within Tolerances.active) may be a kink nearby: IPOPT's answer and
            # its polish treat it as active, and the guard gets to see it.
            and near_active_count(pt, self._bounds, tol) == len(cert.active)
        )
        if not ok:
            return None
        elapsed = time.perf_counter() - t0
        return LocalResult(
            p, pt.f, pt.grad_p.copy(), pt.x, pt.lam_g, pt.lam_x, pt.g, Status.CONVERGED,
            "continued from the warm start (Newton on its active set)", 0, elapsed, 0.0, cert, self,
        )  # fmt: skip

    def sensitivity(self, result: LocalResult) -> Sensitivity:
        """Sensitivities of ``result`` (see :mod:`negotiate.core.sensitivity`), or why they are not available."""
        cert = result.certificate
        if not result.success or cert is None:
            return Sensitivity(False, f"the solve did not converge (status {result.status})")
        if cert.verdict != "smooth":
            return Sensitivity(False, f"certificate is {cert.verdict}: {cert.reason}")
        pt = self._point(result.x, result.p, result.lam_g, result.lam_x)
        L_px, G_p, L_pp = self._cross(result.x, result.p, result.lam_g)
        rows, _ = active_rows(cert, self.n_g)
        with _one_blas_thread():
            return solve_sensitivity(
                pt.H,
                pt.J,
                rows,
                L_px.reshape(self.n_p, self.n_x),
                G_p.reshape(self.n_g, self.n_p),
                L_pp.reshape(self.n_p, self.n_p),
            )

    def __repr__(self) -> str:
        return f"ParametricNLP(name={self.name!r}, n_x={self.n_x}, n_p={self.n_p}, n_g={self.n_g})"


def _not_finite(what: str, values: np.ndarray, names: Sequence[str]) -> str:
    """``"gradient not finite: dV/d(share) = inf"``: the first entries of ``values`` that are not finite."""
    bad = np.flatnonzero(~np.isfinite(values))
    label = "dV/d({})" if what == "gradient" else "{}"
    shown = ", ".join(
        f"{label.format(names[i] if i < len(names) else f'[{i}]')} = {values[i]}" for i in bad[:3]
    ) + (f" and {bad.size - 3} more" if bad.size > 3 else "")
    return f"{what} not finite: {shown}"


def _screened(res: LocalResult) -> LocalResult:
    """``res``, or -- when it claims a solution whose value or gradient is not a finite number (of the
    parameters' shape) -- a ``failed`` copy without gradient or certificate, its message naming the quantity.

    The coordinator's QPs take values and gradients as they come; an ``inf`` there is no failed agent but a
    failed run. :meth:`ParametricNLP.solve` screens its own answers, :func:`try_solve` those of any agent.
    """
    if not res.success:
        return res if res.gradient is None else replace(res, gradient=None)
    names = res._problem.p_names if isinstance(res._problem, ParametricNLP) else ()
    try:
        value = float(res.value)
        grad = None if res.gradient is None else np.asarray(res.gradient, dtype=float)
    except (TypeError, ValueError) as exc:
        why = f"value or gradient not a number ({exc})"
    else:
        p_shape = np.shape(res.p)
        if not np.isfinite(value):
            why = f"value not finite: V = {value}"
        elif grad is None:
            why = "no gradient"
        elif grad.shape != p_shape:
            why = f"gradient of shape {grad.shape}, expected {p_shape}"
        elif not np.all(np.isfinite(grad)):
            why = _not_finite("gradient", grad, names)
        else:
            return res
    return replace(
        res, gradient=None, certificate=None, status=Status.FAILED, message=f"{res.message}; re-check failed: {why}"
    )


def screen_result(problem: ParametricNLP, p: Any, result: Any) -> LocalResult:
    """An agent's answer at ``p`` as the coordinator may use it: ``result`` when it is a sound
    :class:`LocalResult`; a ``failed`` one, its message saying why, when it is not a LocalResult or claims a
    solution whose value or gradient is not finite (see :func:`try_solve`)."""
    if not isinstance(result, LocalResult):
        return LocalResult.failure(problem, p, f"the solve returned a {type(result).__name__}, not a LocalResult")
    return _screened(result)


def try_solve(problem: ParametricNLP, p: Any, warm: LocalResult | None = None, **kwargs: Any) -> LocalResult:
    """``problem.solve(p, warm=warm, **kwargs)`` for any agent, built-in or user-written, as a result always.

    An exception raised by the solve (a user model's code) becomes a ``failed`` result whose message names
    the exception's type and text; a result that claims a solution whose value or gradient is not finite
    becomes ``failed`` too (never a gradient). Every place that solves an agent for the coordinator goes
    through here, so a faulty agent is a failed agent, never a failed run.
    """
    try:
        res = problem.solve(p, warm=warm, **kwargs)
    except Exception as exc:  # noqa: BLE001 - user code: any exception of a solve is a failed solve
        return LocalResult.failure(problem, p, f"the solve raised {type(exc).__name__}: {exc}")
    return screen_result(problem, p, res)
