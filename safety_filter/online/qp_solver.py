"""The filter's quadratic program in acceleration form, set up once and updated per step.

Each control step the filter solves (docs/method.md), with ``u = M a + h``::

    minimise over a    sum_j w_j (a_j - a_nom_j)^2        (the filter's default), or
                       (M a + h - u_nom)^T W (M a + h - u_nom)   (torque weights given)
    subject to         An <= a <= Ap                      (barrier rows, identity block)
                       -umax <= M a + h <= umax           (torque rows, M block)

with ``a_nom = M^-1 (u_nom - h)``. The acceleration objective scales to ``P = I``
(``a = D y`` with ``d_j = 1 / sqrt(w_j)``;
:func:`safety_filter.online.kernels.fill_qp_acceleration`).
For the torque objective, ``W = diag(w) > 0``; in OSQP's form ``1/2 a^T P a + c^T a`` with
``l <= A a <= u`` this is ``P = M W M`` (dense upper triangle), ``c = M W (h - u_nom)``,
``A = [I; M]``, ``l = [An; -umax - h]``, ``u = [Ap; umax - h]`` (a common factor of the
cost does not change the minimiser), scaled as :class:`AccelerationQP` explains. The
sparsity pattern is the same at every state, so :class:`AccelerationQP` builds the OSQP
problem once (every entry of the pattern stored explicitly, even where ``M`` happens to be
zero) and per step only writes the new values into preallocated buffers, hands them to
OSQP and warm-starts from the previous answer.

The solver's answer is never trusted blindly: :meth:`AccelerationQP.solve` returns a
:class:`QPResult` with the status, and the caller checks the constraints explicitly before
using the answer (:func:`check_acceleration` is that check in plain form; the filter does
the same with preallocated buffers).

Works with OSQP 1.x (the tested version) and 0.6 (setting names and status codes differ; the
codes for "solved" and "solved inaccurate" are 1 and 2 in both).

OSQP's own text never reaches the output (:func:`silence_solver_output`): OSQP 1.x (1.0.0 to
1.1.3 at least) prints "Polishing not needed - no active set detected at optimal point"
whenever an answer has no active constraint, whatever ``verbose`` says, and no setting turns
it off.
"""

from __future__ import annotations

import math
import sys
import time
from typing import Any

import numpy as np
import osqp
import scipy.sparse as sparse

from safety_filter.errors import InvalidValue
from safety_filter.online import kernels as _kernels

STATUS_SOLVED = 1  # OSQP_SOLVED in OSQP 0.6 and 1.x
STATUS_SOLVED_INACCURATE = 2  # OSQP_SOLVED_INACCURATE in OSQP 0.6 and 1.x
# OSQP's termination tolerances (scaled problem). Accuracy comes from polishing (an
# active-set solve on the active set that ADMM found), not from the tolerance: the ADMM
# iterations only have to find the active set. So a solve first runs with the loose
# DEFAULT_EPS; only if polishing then does not succeed (about 0.6 % of random 7-joint
# states, 0.05 % along trajectories) does it continue, warm-started, at ACCURATE_EPS and
# polish again. On the demo arms this gave the same answers to the last bit as solving at
# ACCURATE_EPS throughout, with the solve time's median about 25 % and its 99th percentile
# about 30 % lower. (1e-8 instead of 1e-6 as the accurate tolerance cost 30-80 % more
# iterations at the 99th percentile, for no gain in the polished answers.)
DEFAULT_EPS = 1e-3
ACCURATE_EPS = 1e-6
DEFAULT_MAX_ITER = 1000
_OSQP_MAJOR = int(str(getattr(osqp, '__version__', '1')).split('.')[0] or 1)


# ---------------------------------------------------------------------- solver output
# Where OSQP's text comes from. OSQP 1.x's C code prints through ``c_print``, which its
# Python extension maps to CPython's ``PySys_WriteStdout``: each message is a call of
# ``sys.stdout.write`` made from inside the solve call, on the solving thread. The polishing
# routine prints its "no active set" line unconditionally (``verbose`` only governs the
# iteration log), so it shows up on every step where the filter leaves the nominal alone
# (and twice when the accurate retry runs). The only place to catch it without touching
# file descriptors per step is that ``write`` call: :class:`_SolverQuietStdout` stands in
# for ``sys.stdout`` once per process and drops exactly the writes whose calling Python
# frame is one of our calls into OSQP (a C extension has no frame of its own, so the caller
# of ``write`` is the Python function that called the solver). Everything else passes
# through unchanged, and nothing is added to the step: the check runs only when something
# is written.
def _solver_call_sites() -> frozenset[Any]:
    """Code objects of the Python functions that call into OSQP's compiled code."""
    sites = {AccelerationQP.__init__.__code__, AccelerationQP.solve.__code__,
             AccelerationQP.reset_warm_start.__code__, AccelerationQP._settings_copy.__code__}
    # OSQP's own Python wrapper (the path taken with OSQP 0.6, and by setup/warm_start).
    wrapper = getattr(osqp, 'OSQP', None)
    for value in vars(wrapper).values() if wrapper is not None else ():
        code = getattr(value, '__code__', None)
        if code is not None:
            sites.add(code)
    return frozenset(sites)


class _SolverQuietStdout:
    """``sys.stdout`` as before, minus what OSQP writes during our calls into it.

    Every attribute but ``write`` is the wrapped stream's, so ``fileno()``, ``isatty()``,
    ``buffer``, ``encoding`` and ``flush()`` behave as they did.
    """

    def __init__(self, stream: Any, call_sites: frozenset[Any]) -> None:
        self._safety_filter_stream = stream
        self._safety_filter_sites = call_sites

    def write(self, text: str) -> int:
        """Write ``text`` to the wrapped stream, unless OSQP wrote it from a solver call."""
        try:
            caller = sys._getframe(1).f_code
        except ValueError:  # called from C with no Python frame on this thread: not ours
            caller = None
        if caller in self._safety_filter_sites:
            return len(text)
        return self._safety_filter_stream.write(text)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._safety_filter_stream, name)


def silence_solver_output() -> None:
    """Keep OSQP's messages off standard output, from now on, in this process.

    Idempotent and cheap; :class:`AccelerationQP` calls it when it is built, so any program
    that runs the filter step gets it. Replaces ``sys.stdout`` by a stand-in that passes
    everything through except what OSQP writes from inside this module's solver calls. A
    ``sys.stdout`` replaced later (``contextlib.redirect_stdout``, a test's capture) is
    wrapped again by the next :class:`AccelerationQP` built, not by the step. Without a
    ``sys.stdout`` (``None``) there is nothing to wrap: CPython then writes OSQP's text to
    the C-level stdout.
    """
    stream = sys.stdout
    if stream is None or isinstance(stream, _SolverQuietStdout):
        return
    sys.stdout = _SolverQuietStdout(stream, _solver_call_sites())


class QPResult:
    """Outcome of one solve.

    Attributes:
        acceleration: the solver's answer ``a`` [rad/s^2 or m/s^2], shape (n,); NaN when
            the solver returned nothing usable.
        status: the solver's status text, lower case (e.g. ``'solved'``,
            ``'maximum iterations reached'``, ``'run time limit reached'``).
        status_code: the solver's numeric status.
        solved: status is "solved" or "solved inaccurate" (the answer still has to pass
            :func:`check_acceleration`).
        iterations: ADMM iterations.
        solve_time_s: wall time of the update and the solve [s].
    """

    __slots__ = ('acceleration', 'status', 'status_code', 'solved', 'iterations',
                 'solve_time_s')

    def __init__(self, acceleration: np.ndarray, status: str, status_code: int,
                 iterations: int, solve_time_s: float) -> None:
        self.acceleration = acceleration
        self.status = status
        self.status_code = status_code
        self.solved = status_code in (STATUS_SOLVED, STATUS_SOLVED_INACCURATE)
        self.iterations = iterations
        self.solve_time_s = solve_time_s

    def __repr__(self) -> str:
        return (f'QPResult(status={self.status!r}, iterations={self.iterations}, '
                f'solve_time_s={self.solve_time_s:.2e})')


def _osqp_settings(eps: float, max_iter: int, time_limit_s: float | None,
                   polish: bool) -> dict[str, Any]:
    settings: dict[str, Any] = {
        'verbose': False,
        'eps_abs': eps,
        'eps_rel': eps,
        'max_iter': int(max_iter),
        'scaling': 0,  # the problem arrives scaled (see AccelerationQP)
        # Tuned on the demo arms (trajectories pushing into the limits and random states in
        # S with nominals up to 1000x the box; see AccelerationQP): a smaller relaxation, a
        # finer termination check and a larger initial rho cut the iteration counts.
        'alpha': 1.2,
        'check_termination': 5,
        'rho': 1.0,
        # A fixed interval for rho adaptation: OSQP's default adapts on a measured-time
        # basis, which makes iteration counts (and so answers) depend on the machine's load.
        'adaptive_rho_interval': 25,
        'polish_refine_iter': 3,
    }
    if _OSQP_MAJOR >= 1:
        settings['polishing'] = polish
        settings['warm_starting'] = True
    else:
        settings['polish'] = polish
        settings['warm_start'] = True
    if time_limit_s is not None:
        settings['time_limit'] = float(time_limit_s)
    return settings


class AccelerationQP:
    """The acceleration-form filter QP for ``n`` joints, built once, updated per step.

    Scaling. The demo arms' QPs are badly scaled: inertias span four orders of magnitude
    from shoulder to wrist. With OSQP's own (Ruiz) equilibration a 7-joint solve took
    500-4000 iterations and often hit the cap; so the QP is handed to OSQP already scaled
    and OSQP's scaling is off. Per step, the variable is ``s = a / d`` with the Jacobi
    scaling of the cost, ``d_j = 1 / sqrt((M W M)_jj)`` (so ``P`` has a unit diagonal), the
    torque rows are divided by ``umax`` and the cost by ``c = max(1, max |q|)`` (a positive
    factor: the minimiser is unchanged)::

        P = D M W M D / c,   q = D M W (h - u_nom) / c,   A = [I; U^-1 M D]
        l = [An / d; -1 - h / umax],   u = [Ap / d; 1 - h / umax]

    with ``D = diag(d)``, ``U = diag(umax)``. On recorded filter runs (trajectories pushing
    into the limits, and random states in S with nominals up to 1000x the box) this gave
    median 10-15 and 99th-percentile 50-120 iterations, against a fixed scaling by the
    authority that needed up to 800 at the 99th percentile on a trajectory (at the
    accurate tolerance). Accuracy comes from OSQP's polishing (an active-set solve); the
    tolerances apply to the scaled problem: a loose one for the first attempt, the accurate
    one if polishing did not succeed (:data:`DEFAULT_EPS`, :data:`ACCURATE_EPS`), and if
    polishing fails then too, the caller's check decides.

    Args:
        torque_limit: ``umax`` [N m], shape (n,), positive.
        torque_weights: positive weights ``w`` of the torque deviation, shape (n,)
            (default ones) [1/(N m)^2 up to a common scale].
        acceleration_weights: positive weights ``w_a`` of the acceleration deviation: when
            given, the objective is ``sum_j w_a_j (a_j - a_nom_j)^2`` instead of the torque
            deviation (a joint the bounds do not touch keeps its nominal acceleration;
            ``a_nom = M^-1 (u_nom - h)``).
        eps: OSQP's absolute and relative termination tolerance (scaled problem) of the
            first attempt; when polishing does not succeed the solve goes on at
            ``min(eps, ACCURATE_EPS)`` (see :data:`ACCURATE_EPS`).
        max_iter: iteration cap of one solve.
        time_limit_s: OSQP's time limit per solve [s] (None: no limit).
        polish: let OSQP polish its answer (recommended: it is what makes the answer exact).
        mass_hint: a representative inertia matrix for the set-up (values only: the
            pattern is dense anyway); default identity.

    Raises:
        InvalidValue: on invalid sizes, weights or settings.
    """

    def __init__(
        self,
        torque_limit: np.ndarray,
        torque_weights: np.ndarray | None = None,
        *,
        acceleration_weights: np.ndarray | None = None,
        eps: float = DEFAULT_EPS,
        max_iter: int = DEFAULT_MAX_ITER,
        time_limit_s: float | None = None,
        polish: bool = True,
        mass_hint: np.ndarray | None = None,
    ) -> None:
        umax = np.array(torque_limit, dtype=float).reshape(-1)
        n = len(umax)
        if n < 1:
            raise InvalidValue('torque_limit', umax.tolist(), 'one value per joint, at least one')
        if not np.all(np.isfinite(umax)) or np.any(umax <= 0):
            raise InvalidValue('torque_limit', umax.tolist(), 'positive and finite')
        weights = np.ones(n) if torque_weights is None else np.array(
            torque_weights, dtype=float).reshape(-1)
        if weights.shape != (n,) or not np.all(np.isfinite(weights)) or np.any(weights <= 0):
            raise InvalidValue('torque_weights', torque_weights,
                               f'{n} positive finite numbers')
        accel_weights = None
        if acceleration_weights is not None:
            accel_weights = np.array(acceleration_weights, dtype=float).reshape(-1)
            if accel_weights.shape != (n,) or not np.all(np.isfinite(accel_weights)) \
                    or np.any(accel_weights <= 0):
                raise InvalidValue('acceleration_weights', acceleration_weights,
                                   f'{n} positive finite numbers')
            if torque_weights is not None:
                raise InvalidValue('weights', 'torque_weights and acceleration_weights',
                                   'one of them, not both')
        if time_limit_s is not None and not (math.isfinite(time_limit_s) and time_limit_s > 0):
            raise InvalidValue('time_limit_s', time_limit_s, 'positive and finite')
        if not (eps > 0 and max_iter >= 1):
            raise InvalidValue('eps, max_iter', (eps, max_iter), 'eps > 0 and max_iter >= 1')
        silence_solver_output()
        self.n = n
        for values in (umax, weights):
            values.flags.writeable = False
        self.torque_limit = umax
        self.weights = weights
        self.acceleration_weights = accel_weights
        self.objective = 'torque' if accel_weights is None else 'acceleration'
        self.settings = _osqp_settings(eps, max_iter, time_limit_s, polish)
        self.accurate_eps = min(float(eps), ACCURATE_EPS)
        # Retry at the accurate tolerance when polishing did not succeed (see ACCURATE_EPS);
        # pointless without polishing or when eps is already that tight.
        self._retry = polish and self.accurate_eps < eps

        # Constant factors (private writable copies: the kernels take one array type).
        self._sqrt_weights = np.sqrt(weights)
        self._sqrt_accel_weights = None if accel_weights is None else np.sqrt(accel_weights)
        self._accel_nominal = np.empty(n)
        self._umax = umax.copy()

        # Index maps: P's upper triangle in CSC order (column j holds rows 0..j); A = [I; B]
        # in CSC order is, column by column, a 1 followed by column j of B.
        self._p_rows = np.concatenate([np.arange(j + 1) for j in range(n)]).astype(np.int64)
        self._p_cols = np.concatenate([np.full(j + 1, j) for j in range(n)]).astype(np.int64)
        p_indptr = np.concatenate([[0], np.cumsum(np.arange(1, n + 1))]).astype(np.int64)
        a_indices = np.concatenate([[j, *range(n, 2 * n)] for j in range(n)]).astype(np.int64)
        a_indptr = np.arange(0, n * (n + 1) + 1, n + 1, dtype=np.int64)

        # Preallocated per-step buffers.
        self._root = np.empty((n, n))  # W^(1/2) M D
        self._px = np.empty(len(self._p_rows))
        self._ax = np.empty(n * (n + 1))
        self._scale = np.empty(n)  # d
        self._inv_scale = np.empty(n)  # 1 / d
        self._c = np.empty(n)
        self._lower = np.empty(2 * n)
        self._upper = np.empty(2 * n)

        mass = np.eye(n) if mass_hint is None else np.array(mass_hint, dtype=float)
        if mass.shape != (n, n) or not np.all(np.isfinite(mass)):
            raise InvalidValue('mass_hint', f'shape {mass.shape}', f'a finite {n} x {n} matrix')
        zeros = np.zeros(n)
        self._fill(mass, zeros, zeros, -np.ones(n), np.ones(n))
        p_matrix = sparse.csc_matrix((self._px.copy(), self._p_rows, p_indptr), shape=(n, n))
        a_matrix = sparse.csc_matrix((self._ax.copy(), a_indices, a_indptr), shape=(2 * n, n))
        self._solver = osqp.OSQP()
        self._solver.setup(p_matrix, self._c.copy(), a_matrix, self._lower.copy(),
                           self._upper.copy(), **self.settings)
        # OSQP 1.x: call the compiled solver directly; its Python wrapper rebuilds an info
        # namespace on every solve, which costs about as much as a 7-joint solve.
        inner = getattr(self._solver, '_solver', None)
        self._fast = (inner is not None and hasattr(inner, 'update_data_vec')
                      and hasattr(inner, 'update_data_mat') and hasattr(inner, 'solution'))
        self._inner = inner
        if self._fast and self._retry:
            # Two settings objects to switch between with one call each way.
            self._first_settings = self._settings_copy()
            self._accurate_settings = self._settings_copy()
            self._accurate_settings.eps_abs = self.accurate_eps
            self._accurate_settings.eps_rel = self.accurate_eps
        self._zeros_x = np.zeros(n)
        self._zeros_y = np.zeros(2 * n)
        self._status_text: dict[int, str] = {}
        self._shape = (n,)

    def _fill(self, mass: np.ndarray, bias: np.ndarray, torque_nominal: np.ndarray,
              accel_lower: np.ndarray, accel_upper: np.ndarray,
              accel_nominal: np.ndarray | None = None) -> None:
        """The scaled OSQP data at one state, for this QP's objective."""
        if self._sqrt_accel_weights is None:
            _kernels.fill_qp(mass, bias, torque_nominal, accel_lower, accel_upper,
                             self._sqrt_weights, self._umax, self._p_rows, self._p_cols,
                             self._root, self._scale, self._inv_scale, self._px, self._ax,
                             self._c, self._lower, self._upper)
            return
        nominal = self._accel_nominal
        nominal[:] = (np.linalg.solve(mass, torque_nominal - bias) if accel_nominal is None
                      else accel_nominal)
        if not np.all(np.isfinite(nominal)):  # (a huge nominal): keep the solver's data finite
            np.nan_to_num(nominal, copy=False, nan=0.0, posinf=1e300, neginf=-1e300)
        _kernels.fill_qp_acceleration(mass, bias, nominal, accel_lower, accel_upper,
                                      self._sqrt_accel_weights, self._umax, self._p_rows,
                                      self._p_cols, self._scale, self._inv_scale, self._px,
                                      self._ax, self._c, self._lower, self._upper)

    def _settings_copy(self) -> Any:
        """A copy of the solver's current OSQP 1.x settings object."""
        current = self._solver.settings
        copy = self._solver.ext.OSQPSettings()
        for name in dir(current):
            if not name.startswith('_'):
                try:
                    setattr(copy, name, getattr(current, name))
                except (AttributeError, TypeError):
                    pass  # read-only or a method
        return copy

    # ------------------------------------------------------------------ per step
    def solve(
        self,
        mass: np.ndarray,
        bias: np.ndarray,
        torque_nominal: np.ndarray,
        accel_lower: np.ndarray,
        accel_upper: np.ndarray,
        accel_nominal: np.ndarray | None = None,
    ) -> QPResult:
        """Solve at one state.

        Args:
            mass: ``M(q)``, symmetric positive definite, shape (n, n).
            bias: ``h(q, v)`` [N m], shape (n,).
            torque_nominal: nominal full torque ``u_nom`` [N m], shape (n,).
            accel_lower, accel_upper: ``An``, ``Ap`` [rad/s^2], shape (n,).
            accel_nominal: ``M^-1 (u_nom - h)`` when the caller has it (the acceleration
                objective needs it; computed here otherwise).

        Returns:
            A :class:`QPResult` with the acceleration ``a`` (unscaled); never raises for
            solver failures (the status says so).
        """
        n = self.n
        start = time.perf_counter()
        lower, upper = self._lower, self._upper
        self._fill(mass, bias, torque_nominal, accel_lower, accel_upper, accel_nominal)
        c = self._c
        try:
            if self._fast:
                inner = self._inner
                inner.update_data_vec(q=c, l=lower, u=upper)
                inner.update_data_mat(P_x=self._px, P_i=None, A_x=self._ax, A_i=None)
                inner.solve()
                info = inner.info
                iterations = int(info.iter)
                if self._retry and info.status_polish != 1:
                    # Polishing did not succeed: go on from here at the accurate tolerance.
                    inner.update_settings(self._accurate_settings)
                    try:
                        inner.solve()
                    finally:
                        inner.update_settings(self._first_settings)
                    info = inner.info
                    iterations += int(info.iter)
                x = inner.solution.x
            else:
                self._solver.update(Px=self._px, Ax=self._ax, q=c, l=lower, u=upper)
                result = self._solver.solve()
                info = result.info
                iterations = int(info.iter)
                if self._retry and getattr(info, 'status_polish', 1) != 1:
                    eps = self.accurate_eps
                    self._solver.update_settings(eps_abs=eps, eps_rel=eps)
                    try:
                        result = self._solver.solve()
                    finally:
                        first = self.settings['eps_abs']
                        self._solver.update_settings(eps_abs=first, eps_rel=first)
                    info = result.info
                    iterations += int(info.iter)
                x = result.x
            code = int(info.status_val)
            status = self._status_text.get(code)
            if status is None:  # first time this code is seen (the text costs a few us)
                status = self._status_text[code] = str(info.status).lower()
        except Exception as err:  # noqa: BLE001 - a solver crash is a status, not a crash
            x = None
            code = -1000
            status = f'solver error: {type(err).__name__}: {err}'
            iterations = 0
        acceleration = np.empty(n)
        if isinstance(x, np.ndarray) and x.shape == self._shape:
            _kernels.unscale(x, self._scale, acceleration)
        else:
            acceleration[:] = np.nan
        return QPResult(acceleration, status, code, iterations, time.perf_counter() - start)

    def reset_warm_start(self) -> None:
        """Forget the previous answer: the next solve starts from zero."""
        try:
            self._solver.warm_start(x=self._zeros_x, y=self._zeros_y)
        except Exception:  # noqa: BLE001 - best effort; a failed reset only costs iterations
            pass


def check_acceleration(
    mass: np.ndarray,
    bias: np.ndarray,
    acceleration: np.ndarray,
    accel_lower: np.ndarray,
    accel_upper: np.ndarray,
    torque_limit: np.ndarray,
    accel_tolerance: np.ndarray | float,
    torque_tolerance: np.ndarray | float,
) -> str:
    """Check an answer against every constraint; ``''`` when it passes, else the reason.

    Passes when ``An - tol_a <= a <= Ap + tol_a`` and ``|M a + h| <= umax + tol_u``. NaN
    anywhere fails.
    """
    torque = mass @ acceleration + bias
    if not bool(np.all(np.abs(torque) <= torque_limit + torque_tolerance)):
        return 'answer failed the check: torque outside the box'
    if not bool(np.all(acceleration >= accel_lower - accel_tolerance)
                and np.all(acceleration <= accel_upper + accel_tolerance)):
        return 'answer failed the check: acceleration bound violated'
    return ''
