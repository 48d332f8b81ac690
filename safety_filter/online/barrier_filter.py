"""The online filter step: from measured state and nominal torque to a safe torque.

:class:`SafetyFilter` is the numeric core that the ROS node, the simulator and replay all
call (no ROS imports here); its parts are in ``safety_filter.online``: ``step_dynamics``,
``disturbance_observer``, ``input_checks``, ``constructive``, ``hold_command``,
``filter_options``, ``filter_output``. One :meth:`SafetyFilter.step` (docs/method.md):

1. **Validate** ``q``, ``v``, ``u_nom`` (shape ``(n,)``, finite); reject positions more than
   ``rejection_distance`` beyond a limit (default half the smallest joint range: a sensor
   fault) and, while the observer runs, a position that jumped farther than ten periods at
   speed allow (until it stays for three samples). Rejected steps send the *hold* command
   ``clip(g(q) - hold_damping * v)`` at the measured (or last valid) position; a position
   beyond a limit but within that distance is recovered from (step 4).
1b. **Model error feedback** (docs/method.md, "Model error"): a disturbance observer
   estimates the torque the arm needs beyond the model from the measured velocity change,
   low-pass filtered with ``observer_time_constant_s``, and takes it out of the bias ``h``.
1c. **Delay** (certificates with ``prediction_s``): the rest of the step works at the state
   predicted for the end of the declared delay, where the torque will start to act.
1d. **Lookahead** (certificates with ``lookahead_s``): each torque is planned for the state
   that much later, the middle of the hold the margin covers: ``M`` and ``h`` at the position
   reached at the current velocity, plus the velocity's share to first order
   (docs/method.md, "Lookahead").
2. **Convert** the nominal to full torque: with ``gravity_convention='driver_compensated'``
   the driver adds ``g(q)`` itself, so ``u_full = u_nom + g(q)`` here and the output is
   ``u* - g(q)``. The torque box ``|u| <= umax`` always applies to the full torque.
3. **Barriers** at ``(q, v)`` with the certificate's gains give the acceleration bounds
   ``An <= a <= Ap`` (tightened by the certificate's sampling margin, and on one side by
   the acceleration the observer's estimate trails a drifting model error by, at most that
   margin again: docs/method.md, "Drift"). With a slow design
   (docs/method.md, "The slow set") both designs' bounds are evaluated: the step keeps the
   state in a design's set that contains it, and where both do, in the one whose answer
   changes the nominal less.
4. **Outside the safe set S** (some barrier negative) the same bounds ask for a return to S at
   the barrier rate. The QP meets them with any torque in the box; where it cannot, the
   constructive recovery ``a_i = clamp(a_nom_i, max(An_i, -e_i), min(Ap_i, e_i))`` pushes
   back within the usable authority ``e``; mode ``'recovering'``.
5. **Inside S** the QP (:mod:`safety_filter.online.qp_solver`) is solved; its answer is used
   only if OSQP says solved and it passes an explicit constraint check, else the same
   constructive formula is used (feasible by construction under the acceleration-authority
   certificate; under a torque-coupling one it is only clipped to the box and may miss the
   bounds); mode ``'fallback'``. A nominal that meets every constraint is the QP's
   minimiser and is sent unchanged (solver status ``'nominal feasible'``).
5b. **Joints at rest** under Coulomb friction (:mod:`safety_filter.online.resting_joints`):
   the nominal's acceleration is the stick-slip answer, and a planned acceleration that
   starts a resting joint gets the torque that breaks it away (docs/method.md).
6. The torque is clipped to the box (full-torque terms), converted to the driver's convention.

Units: [rad], [rad/s], [rad/s^2], [N m] (prismatic joints: [m], [m/s], [m/s^2], [N]).

Kept in one module: every stage of the step reads and writes the filter's preallocated
buffers; its parts that keep no buffers live in the modules named above.
"""

from __future__ import annotations

import math
from collections import Counter
from typing import Any

import numpy as np

from safety_filter.core.barriers import BarrierState, evaluate_barriers
from safety_filter.core.certificate import Certificate
from safety_filter.core.dynamics import Dynamics
from safety_filter.core.robot_model import RobotModel
from safety_filter.online import filter_options as _options
from safety_filter.online import kernels as _kernels
from safety_filter.online.constructive import push_back_harder
from safety_filter.online.delay_prediction import DelayPrediction
from safety_filter.online.disturbance_observer import DisturbanceObserver, narrow_by_lag
from safety_filter.online.filter_output import FilterOutput
from safety_filter.online.hold_command import hold_command, rejected_output
from safety_filter.online.input_checks import PositionJumpCheck, valid_position
from safety_filter.online.mode_codes import FilterMode
from safety_filter.online.qp_solver import DEFAULT_EPS, DEFAULT_MAX_ITER, AccelerationQP
from safety_filter.online.resting_joints import RestingJoints
from safety_filter.online.step_dynamics import StepDynamics, kernel_input

GRAVITY_CONVENTIONS = _options.GRAVITY_CONVENTIONS
CHECK_TOLERANCE = 1e-6  # relative tolerance of the answer check (times max(1, scale))
LAG_CAP_SHARE = 1.0  # the narrowing by the lag at most this share of the design's margin


class SafetyFilter:
    """The certified barrier filter for one arm (docs/method.md).

    Args:
        model: the robot model; must be the one the certificate was computed for.
        certificate: a certified :class:`Certificate` for ``model``.
        gravity_convention: ``'full'`` if the driver takes the full torque,
            ``'driver_compensated'`` if it adds ``g(q)`` itself (nominal and output are then
            torques on top of gravity).
        torque_weights: weights ``w > 0``: when given, the QP minimises the torque change
            ``(u - u_nom)^T diag(w) (u - u_nom)``, shape (n,). By default it minimises the
            change of acceleration ``sum_j (a_j - a_nom_j)^2 / e_j^2`` (``e`` the usable
            authority): a joint the bounds do not touch keeps its nominal acceleration, so
            slowing one joint does not throw the others (docs/method.md).
        payload_mass: payload used for ``M`` and ``h`` [kg]; default the middle of the
            certificate's payload range (the certificate covers the whole range, so the
            constraints hold for any payload in it; the middle keeps the model error of the
            nominal dynamics smallest in the worst case).
        backend: dynamics backend of :class:`Dynamics` (``'auto'``, ``'numpy'``,
            ``'pinocchio'``).
        solver_time_limit_s: OSQP time limit per solve [s]; None: only the iteration cap.
        rejection_distance: positions farther than this beyond a limit [rad or m] are
            rejected as a sensor fault; default half the smallest joint range. Closer ones
            are recovered from.
        observer_time_constant_s: time constant of the disturbance observer [s], scalar or
            per joint; default the certificate's (per joint: the fastest whose noise costs
            about 1 % of the torque limit, between 2 and 20 control periods); 0 turns the
            observer off (the filter then trusts its model exactly).
        hold_damping: damping of the hold command [N m s/rad], scalar or shape (n,);
            default ``M_ii(q_mid) / (20 T)``: a velocity time constant of twenty control
            periods ``T`` at the mid-range configuration (stable for the sampled loop as
            long as ``M_ii(q)`` stays above a tenth of its mid-range value).
        solver_max_iter, solver_eps: OSQP's iteration cap and tolerance.

    Raises:
        CertificateMismatch: the certificate belongs to another model.
        CertificateError: the certificate is not certified or unusable.
        InvalidValue: an invalid option (the subclass and its attributes say which).
    """

    def __init__(
        self,
        model: RobotModel,
        certificate: Certificate,
        *,
        gravity_convention: str = 'full',
        torque_weights: np.ndarray | None = None,
        payload_mass: float | None = None,
        backend: str = 'auto',
        solver_time_limit_s: float | None = None,
        rejection_distance: float | None = None,
        hold_damping: float | np.ndarray | None = None,
        solver_max_iter: int = DEFAULT_MAX_ITER,
        solver_eps: float = DEFAULT_EPS,
        observer_time_constant_s: float | np.ndarray | None = None,
    ) -> None:
        options = _options.check_filter_options(model, certificate, gravity_convention,
                                                payload_mass, rejection_distance,
                                                observer_time_constant_s)
        time_constants, usable = options.time_constants, options.usable_authority
        payload_mass, rejection_distance = options.payload_mass, options.rejection_distance
        n = model.n_joints

        self.model = model
        self.certificate = certificate
        self.n = n
        self.gravity_convention = gravity_convention
        self.payload_mass = float(payload_mass)
        self.rejection_distance = float(rejection_distance)
        self.dynamics = Dynamics(model, self.payload_mass, backend=backend)
        self._dyn = StepDynamics(
            self.dynamics, certificate.acceleration_hold_s, certificate.lookahead_s,
            (np.array(certificate.position_lower), np.array(certificate.position_upper)))
        self._driver = gravity_convention == 'driver_compensated'

        def frozen(values: Any) -> np.ndarray:
            array = np.array(values, dtype=float)
            array.flags.writeable = False
            return array

        self.torque_limit = frozen(certificate.effort_limit)
        self.usable_authority = frozen(usable)
        self._lower = frozen(certificate.position_lower)
        self._upper = frozen(certificate.position_upper)
        self._accel_tol = frozen(CHECK_TOLERANCE * np.maximum(1.0, usable))
        self._torque_tol = frozen(CHECK_TOLERANCE * np.maximum(1.0, self.torque_limit))
        self._torque_saturation = frozen(self.torque_limit - self._torque_tol)

        q_mid = 0.5 * (self._lower + self._upper)
        mass_mid = self.dynamics.mass_matrix(q_mid)
        self.hold_damping = frozen(_options.checked_hold_damping(hold_damping, mass_mid,
                                                        certificate.control_rate_hz))
        self.observer_time_constant_s = frozen(time_constants)
        self._observing = bool(np.all(time_constants > 0.0))
        # The declared delay, in certified periods: the observer keeps it as a time.
        uncertainty = certificate.uncertainty
        self.observer_delay_periods = int(uncertainty.delay_periods) if uncertainty else 0
        # The range the estimate is kept in: where the certificate's authority accounts for
        # it (docs/method.md); a second model one kilogram heavier gives the payload's share.
        parameters = certificate.disturbance_parameters
        heavier = (StepDynamics(Dynamics(model, self.payload_mass + 1.0, backend=backend))
                   if parameters is not None else None)
        self._observer = DisturbanceObserver(
            time_constants, self.observer_delay_periods, self.torque_limit, self._dyn,
            heavier, parameters, certificate.control_period_s)
        self._jump_check = PositionJumpCheck(
            model.joint_names, certificate.velocity_limit,
            float(uncertainty.position_noise) if uncertainty else 0.0,
            certificate.control_period_s)
        self._steps_since_valid = 0
        self._resting = RestingJoints(model.coulomb_friction, self._accel_tol)

        acceleration_weights = (None if torque_weights is not None
                                else 1.0 / np.maximum(usable, 1e-9) ** 2)
        self._qp = AccelerationQP(self.torque_limit, torque_weights,
                                  acceleration_weights=acceleration_weights, eps=solver_eps,
                                  max_iter=solver_max_iter, time_limit_s=solver_time_limit_s,
                                  mass_hint=mass_mid)
        self.torque_weights = self._qp.weights
        self.objective = self._qp.objective

        # Private writable copies of the constants for the compiled kernels (one array type).
        self._k_barrier = _kernels.barrier_arguments(certificate)
        self._k_torque_limit = np.array(self.torque_limit)
        self._k_torque_bound = self.torque_limit + self._torque_tol  # the answer check's box
        self._k_accel_tol = np.array(self._accel_tol)
        self._k_saturation = np.array(self._torque_saturation)
        self._k_authority = np.array(usable)
        self._k_authority_main = self._k_authority
        # A slow design (docs/method.md, "The slow set"): its own barrier constants, rows and
        # authority; each step keeps the state in a design's set that contains it.
        slow = certificate.slow_design
        self._k_barrier_slow = None if slow is None else _kernels.barrier_arguments(slow)
        self._k_authority_slow = None if slow is None else np.array(slow.usable_authority)
        # The narrowing by the observer's lag goes at most as far as the design's margin.
        self._lag_cap = np.array(certificate.sampling_margin, dtype=float) * LAG_CAP_SHARE
        self._lag_cap_slow = (None if slow is None else
                              np.array(slow.sampling_margin, dtype=float) * LAG_CAP_SHARE)
        self._rows_slow = np.empty((8, n))
        self._smallest_slow = np.empty(n)
        self._slow_now = False  # the slow design's rows are in _rows this step
        self._both_sets = False  # the state is in both designs' sets this step
        # With a declared delay the certificate's margin covers (prediction_s), each torque
        # is planned for the state at the end of the delay (online/delay_prediction.py).
        self._ahead = (DelayPrediction(certificate.prediction_s, self._dyn, self._k_barrier,
                                       np.array(model.coulomb_friction))
                       if certificate.prediction_s else None)

        # Preallocated per-step buffers.
        self._inputs = np.empty((3, n))
        self._planned = np.full((2, n), np.nan)  # the state the last step planned for
        # Barrier rows [hp; hn; bp; bn; Ap; An; sp; sn] (docs/method.md), written by
        # _kernels.barrier_rows.
        self._rows = np.empty((8, n))
        self._accel_upper = self._rows[4]
        self._accel_lower = self._rows[5]
        self._mass = np.empty((n, n))
        self._bias = np.empty(n)
        self._torque_full = np.empty(n)
        self._no_gravity = np.zeros(n)
        self._a_nom: np.ndarray | None = None
        self._last_q = np.zeros(n)
        self._has_last_q = False
        self.mode_counts: dict[FilterMode, int] = {}
        self.reason_counts: Counter[str] = Counter()
        self.reset()
        self._warm_up(q_mid)
        self.reset()

    def _warm_up(self, q_mid: np.ndarray) -> None:
        """Run every branch of the step once (the compiled kernels load now, not at the
        first control step)."""
        zeros = np.zeros(self.n)
        self.step(q_mid, zeros, zeros)  # nominal checked, passed or filtered
        self.step(q_mid, zeros, 10.0 * self.torque_limit)  # outside the box: the QP
        beyond = np.array(self._upper) + 0.5 * self.rejection_distance
        self.reset()  # (else that position would be a jump from the last one)
        self.step(beyond, zeros, zeros)  # outside S: recovery (constructive kernel)
        self.step(np.full(self.n, math.nan), zeros, zeros)  # rejected

    # ------------------------------------------------------------------ diagnostics
    def reset(self) -> None:
        """Forget the warm start, the last valid position, the disturbance estimate and the
        counters."""
        self._qp.reset_warm_start()
        self._has_last_q = False
        self._observer.reset()
        self._jump_check.reset()
        self._steps_since_valid = 0
        self.mode_counts = {mode: 0 for mode in FilterMode}
        self.reason_counts = Counter()
        self.steps = 0
        self.slow_steps = 0  # steps that kept the state in the slow design's set

    def statistics(self) -> dict[str, Any]:
        """Counts of steps per mode and of the reasons for non-filtered steps."""
        return {'steps': self.steps, 'slow_steps': self.slow_steps,
                'modes': {mode.value: count for mode, count in self.mode_counts.items()},
                'reasons': dict(self.reason_counts)}

    def constraint_bounds(self, q: np.ndarray, v: np.ndarray) -> BarrierState:
        """Barrier values and acceleration bounds at ``(q, v)`` with the certificate's gains
        and sampling margin (docs/method.md); batches of shape (..., n) allowed. With a slow
        design these are the main design's; whether a state is in S (the union) is
        ``certificate.safe_set_margins``."""
        c = self.certificate
        return evaluate_barriers(np.asarray(q, dtype=float), np.asarray(v, dtype=float),
                                 c.position_lower, c.position_upper, c.gamma, c.beta,
                                 c.alpha1, c.alpha2, c.sampling_margin, c.velocity_bound,
                                 c.velocity_beta, c.acceleration_bound)

    # ------------------------------------------------------------------ the step
    def _evaluate_barriers(self, q: np.ndarray, v: np.ndarray) -> None:
        """Fill ``_rows = [hp; hn; bp; bn; Ap; An; sp; sn]`` (shape (8, n)) at one state (the
        step does the same inside its first kernel; the tests use this one)."""
        _kernels.barrier_rows(q, v, *self._k_barrier, self._rows, np.empty(self.n))

    @property
    def planned_state(self) -> tuple[np.ndarray, np.ndarray]:
        """``(q, v)`` the last step that reached the dynamics planned for: the measured state,
        or its prediction at the end of the declared delay (certificates with
        ``prediction_s``); NaN before the first such step."""
        return self._planned[0].copy(), self._planned[1].copy()

    @property
    def disturbance_estimate(self) -> np.ndarray:
        """The observer's estimate of the torque the model misses [N m], shape (n,)."""
        return self._observer.disturbance.copy()

    @property
    def disturbance_lag(self) -> np.ndarray:
        """How far the estimate trails a drifting model error [N m], shape (n,): its time
        constant times its low-passed rate; the step narrows its bounds by ``M^-1`` of it."""
        return self._observer.lag.copy()

    def step(self, q: Any, v: Any, u_nom: Any, period_s: float | None = None) -> FilterOutput:
        """Filter one nominal torque at the measured state.

        Args:
            q: joint positions [rad or m], shape (n,).
            v: joint velocities [rad/s or m/s], shape (n,).
            u_nom: nominal torque [N m or N] in the driver's convention, shape (n,).
            period_s: time since the previous step [s], for the disturbance observer;
                default the certificate's control period.

        Returns:
            A :class:`FilterOutput`; invalid input gives mode ``'rejected'``, never an
            exception.
        """
        # The body is written for speed (it runs at the control rate): each stage is one
        # compiled kernel (safety_filter.online.kernels) on preallocated buffers. See
        # benchmarks/bench_filter_step.py.
        try:
            q_in = kernel_input(q)
            v_in = kernel_input(v)
            u_in = kernel_input(u_nom)
        except (TypeError, ValueError) as err:
            return self._reject(q, v, f'input is not numeric: {err}', 'input not numeric')
        shape = (self.n,)
        if q_in.shape != shape or v_in.shape != shape or u_in.shape != shape:
            return self._reject(q, v, f'expected arrays of shape {shape}, got q {q_in.shape}, '
                                f'v {v_in.shape}, u_nom {u_in.shape}', 'wrong shape')
        inputs = self._inputs
        out_real = np.empty((2, self.n))  # [torque; barrier margin], returned to the caller
        out_flags = np.empty((3, self.n), dtype=bool)  # [active upper; active lower; saturated]
        torque, barrier_margin = out_real[0], out_real[1]
        flags, worst, deepest = _kernels.stage_and_bound(
            q_in, v_in, u_in, inputs, *self._k_barrier, self._rows, barrier_margin)
        if flags:
            names = [name for name, bit in (('q', _kernels.NONFINITE_Q),
                                            ('v', _kernels.NONFINITE_V),
                                            ('u_nom', _kernels.NONFINITE_U)) if flags & bit]
            if names:
                return self._reject(q_in, v_in, f'non-finite values in {", ".join(names)}',
                                    'non-finite input')
            return self._reject(q_in, v_in, f'values beyond {_kernels.HUGE_LIMIT:g} in the '
                                'input', 'non-finite input')
        q, v, u_nom_in = inputs[0], inputs[1], inputs[2]
        if worst < 0.0 and deepest < -self.rejection_distance:
            rows = self._rows
            far = [self.model.joint_names[i] for i in range(self.n)
                   if min(rows[0, i], rows[1, i]) < -self.rejection_distance]
            return self._reject(q, v, f'position more than {self.rejection_distance:g} beyond '
                                f'a limit at {", ".join(far)}', 'position far outside limits',
                                position=q, barrier_margin=barrier_margin, u_nom=u_nom_in)
        if self._observing and self._has_last_q:
            jumped, accepted = self._jump_check.check(q, v, self._last_q,
                                                      self._steps_since_valid, period_s)
            if accepted:
                self._observer.restart()  # a re-homed encoder: a new motion
            if jumped:
                return self._reject(q, v, jumped, 'position jump', position=self._last_q.copy(),
                                    barrier_margin=barrier_margin, u_nom=u_nom_in)
        self._last_q[:] = q
        self._has_last_q = True
        self._steps_since_valid = 0

        mass, bias = self._mass, self._bias
        self._dyn.mass_and_bias(q, v, mass, bias)
        if self._observing:
            # (its range at the position where M and h were evaluated)
            self._observer.observe(self._dyn.evaluated, v, mass, bias, period_s)
        smallest = barrier_margin  # each joint's smallest barrier where the torque is planned
        if self._ahead is not None:
            ahead = self._ahead.plan(q, v, mass, bias, self._observer, period_s, self._rows)
            if ahead is not None:  # plan (and convert gravity) at the predicted state
                worst, smallest = ahead, self._ahead.smallest
                q[:] = self._ahead.state[0]
                v[:] = self._ahead.state[1]
        self._planned[0], self._planned[1] = q, v
        self._resting.observe(v)  # joints at rest where the torque is planned
        gravity = self._no_gravity
        if self._driver:
            gravity = self._dyn.gravity(q)
            u_full = np.add(u_nom_in, gravity, out=self._torque_full)
        else:
            u_full = u_nom_in
        accel_upper = self._accel_upper
        accel_lower = self._accel_lower
        self._a_nom = None
        self._slow_now = self._both_sets = False
        self._k_authority = self._k_authority_main
        lag = self._lag_acceleration(mass)
        if lag is not None:
            narrow_by_lag(self._rows, np.clip(lag, -self._lag_cap, self._lag_cap),
                          self._k_authority_main)
        if self._k_barrier_slow is not None:
            worst_slow, _ = _kernels.barrier_rows(q, v, *self._k_barrier_slow, self._rows_slow,
                                                  self._smallest_slow)
            if lag is not None:
                narrow_by_lag(self._rows_slow,
                              np.clip(lag, -self._lag_cap_slow, self._lag_cap_slow),
                              self._k_authority_slow)
            if worst_slow >= 0.0 and worst >= 0.0:
                # In both sets: the main design unless it changes the nominal and the slow
                # one does not (or changes it less: both QPs are solved below).
                self._both_sets = True
                if not self._nominal_feasible(u_full) and self._nominal_feasible(
                        u_full, self._rows_slow):
                    self._use_slow()
            elif worst_slow >= 0.0 or worst_slow > worst:
                self._use_slow()  # only in the slow set, or outside both but nearer it
            if self._slow_now:
                worst = worst_slow
                barrier_margin[:] = self._smallest_slow
                smallest = barrier_margin

        solve_time = 0.0
        status = 'not run'
        acceleration = None
        have_torque = False
        key = reason = ''
        mode = FilterMode.FILTERED
        if worst < 0.0:
            # Outside S the same bounds ask for a return at the barrier rate; the QP meets them
            # with any torque in the box, and the constructive push-back (within the
            # certified authority) is the fallback.
            mode = FilterMode.RECOVERING
            outside = [self.model.joint_names[i] for i in range(self.n) if smallest[i] < 0.0]
            reason = f'state outside the safe set at {", ".join(outside)}'
            key = 'outside the safe set'
        if self._nominal_feasible(u_full):
            # The nominal meets every constraint, so it is the QP's unique minimiser.
            status = 'nominal feasible'
            acceleration = self._a_nom
            torque[:] = u_full  # passed through exactly
            have_torque = True
        else:
            # (the nominal's acceleration, when the pass-through check computed it)
            result = self._qp.solve(mass, bias, u_full, accel_lower, accel_upper, self._a_nom)
            if self._both_sets and not self._slow_now:
                result = self._less_change_of_two(result, mass, bias, u_full)
                if self._slow_now:
                    barrier_margin[:] = self._smallest_slow
            solve_time = result.solve_time_s
            status = result.status
            failed = ''
            if result.solved:
                acceleration = result.acceleration
                check = _kernels.torque_and_check(
                    mass, bias, acceleration, accel_lower, accel_upper, self._k_torque_bound,
                    self._k_accel_tol, torque)
                failed = _kernels.CHECK_REASONS[check]
                have_torque = True
            else:
                failed = f'solver status: {status}'
            if failed:
                acceleration = None
                have_torque = False
                self._qp.reset_warm_start()
                if mode is FilterMode.RECOVERING:
                    reason += f'; constructive push-back ({failed})'
                else:
                    mode = FilterMode.FALLBACK
                    reason = key = failed
        if acceleration is None:
            acceleration = self._constructive(u_full)
            if mode is FilterMode.RECOVERING:
                acceleration = push_back_harder(
                    acceleration, self._a_nom if self._a_nom is not None else acceleration,
                    accel_lower, accel_upper, self._rows, mass, bias, self._k_torque_limit)
        if not have_torque:
            _kernels.torque_and_check(mass, bias, acceleration, accel_lower, accel_upper,
                                      self._k_torque_bound, self._k_accel_tol, torque)
        if status != 'nominal feasible':
            self._resting.add_breakaway(torque, acceleration)
            if not math.isfinite(torque @ torque):  # only with a broken model: never send NaN
                return self._reject(q, v, 'the dynamics gave non-finite numbers',
                                    'non-finite dynamics', position=q,
                                    barrier_margin=barrier_margin)
        intervention = _kernels.finish(torque, u_full, acceleration, accel_lower, accel_upper,
                                       self._k_torque_limit, self._k_accel_tol,
                                       self._k_saturation, gravity, self._driver, out_flags)
        self._observer.sent(torque + gravity, self._resting.breakaway)
        self.steps += 1
        self.slow_steps += self._slow_now
        self.mode_counts[mode] += 1
        if key:
            self.reason_counts[key] += 1
        return FilterOutput(torque, mode, intervention, barrier_margin, out_flags[0],
                            out_flags[1], out_flags[2], solve_time, status, reason,
                            self._slow_now)

    def _lag_acceleration(self, mass: np.ndarray) -> np.ndarray | None:
        """The acceleration by which the disturbance estimate trails a drifting model
        error, ``M^-1 lag`` (None without an observer or a lag)."""
        if not self._observing or not np.any(self._observer.lag):
            return None
        try:
            lag = np.linalg.solve(mass, self._observer.lag)
        except np.linalg.LinAlgError:
            return None
        return lag if np.all(np.isfinite(lag)) else None  # never NaN into the bounds

    def _use_slow(self) -> None:
        """Make the slow design's rows and authority those of this step."""
        self._rows[:] = self._rows_slow
        self._k_authority = self._k_authority_slow
        self._slow_now = True

    def _less_change_of_two(self, main: Any, mass: np.ndarray, bias: np.ndarray,
                            u_full: np.ndarray) -> Any:
        """The state is in both sets and the main design's QP changed the nominal: solve
        the slow design's too and keep whichever answer changes the nominal less in the
        QP's own objective (switching to the slow rows when it is that one)."""
        main_acceleration = np.array(main.acceleration)
        slow = self._qp.solve(mass, bias, u_full, self._rows_slow[5], self._rows_slow[4],
                              self._a_nom)
        if not slow.solved:
            return main
        if main.solved and self._change(main_acceleration, mass, bias, u_full) <= \
                self._change(slow.acceleration, mass, bias, u_full):
            main.acceleration = main_acceleration
            return main
        self._use_slow()
        slow.solve_time_s += main.solve_time_s
        return slow

    def _change(self, acceleration: np.ndarray, mass: np.ndarray, bias: np.ndarray,
                u_full: np.ndarray) -> float:
        """The QP's objective at ``acceleration``: the weighted change of torque or of
        acceleration from the nominal."""
        if self.objective == 'torque':
            change = mass @ acceleration + bias - u_full
            return float(np.sum(self.torque_weights * change * change))
        change = acceleration - self._nominal_acceleration(u_full)
        return float(np.sum(change * change / np.maximum(self.usable_authority, 1e-9) ** 2))

    def _nominal_feasible(self, u_full: np.ndarray, rows: np.ndarray | None = None) -> bool:
        """Whether the nominal (full torque) meets the box and the acceleration bounds of
        ``rows`` (default this step's; the slow design's: ``_rows_slow``).

        Checks the box first, which rules out far-off nominals without a linear solve. Sets
        ``_a_nom`` when it gets to compute it.
        """
        if not _kernels.within_box(u_full, self._k_torque_limit):
            return False
        rows = self._rows if rows is None else rows
        a_nom = self._nominal_acceleration(u_full)
        return _kernels.within_bounds(a_nom, rows[5], rows[4])

    def _nominal_acceleration(self, u_full: np.ndarray) -> np.ndarray:
        """``a_nom = M^-1 (u_nom - h)`` at the current state (cached per step)."""
        if self._a_nom is None:
            inputs = self._inputs
            try:
                self._a_nom = self._dyn.nominal_acceleration(
                    inputs[0], inputs[1], u_full, self._mass, self._bias,
                    self._observer.disturbance if self._observing else None)
                self._a_nom = self._resting.predicted(self._mass, self._a_nom)
            except np.linalg.LinAlgError:
                self._a_nom = np.zeros(self.n)
        return self._a_nom

    def _constructive(self, u_full: np.ndarray) -> np.ndarray:
        """Constructive acceleration (docs/method.md) for the current state's buffers."""
        a_nom = self._nominal_acceleration(u_full)
        acceleration = np.empty(self.n)
        _kernels.constructive(a_nom, self._accel_lower, self._accel_upper, self._k_authority,
                              self._rows, acceleration)
        return acceleration

    def _hold_full(self, position: np.ndarray, v: Any) -> tuple[np.ndarray, np.ndarray]:
        """Full-torque hold command ``clip(g(q) - hold_damping v)`` and ``g(q)``."""
        gravity = self._dyn.gravity(np.array(position, dtype=float))
        return hold_command(gravity, v, self.hold_damping, self.torque_limit), gravity

    def hold_torque(self, q: Any, v: Any) -> np.ndarray:
        """The hold command at ``(q, v)`` in the driver's convention, without a filter step.

        Gravity compensation plus damping toward rest, inside the torque box; what a
        rejected step sends, and what the node uses in place of a stale nominal or after its
        joint-state watchdog trips. Uses the last valid position when ``q`` is invalid, and
        zero torque when there has never been one.
        """
        position = valid_position(q, self._lower, self._upper, self.rejection_distance)
        if position is None:
            if not self._has_last_q:
                return np.zeros(self.n)
            position = self._last_q
        full, gravity = self._hold_full(position, v)
        return full - gravity if self._driver else full

    def _reject(
        self,
        q: Any,
        v: Any,
        reason: str,
        key: str,
        *,
        position: np.ndarray | None = None,
        barrier_margin: np.ndarray | None = None,
        u_nom: np.ndarray | None = None,
    ) -> FilterOutput:
        """The hold command for an invalid input.

        Its position: ``position`` if given, else the measured ``q`` if it is itself valid
        (shape (n,), finite, within the rejection distance; it then becomes the last valid
        position), else the last valid position, else none (zero torque).
        """
        if position is None:
            position = valid_position(q, self._lower, self._upper, self.rejection_distance)
            if position is not None:
                self._last_q[:] = position
                self._has_last_q = True
        if position is None and self._has_last_q:
            position = self._last_q
        hold = self._hold_full(position, v) if position is not None else None
        self._observer.restart()
        self._steps_since_valid += 1
        self.steps += 1
        self.mode_counts[FilterMode.REJECTED] += 1
        self.reason_counts[key] += 1
        return rejected_output(self.n, hold, reason, driver_compensated=self._driver,
                               saturation=self.torque_limit - self._torque_tol, u_nom=u_nom,
                               barrier_margin=barrier_margin)
