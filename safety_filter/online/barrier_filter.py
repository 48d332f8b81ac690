"""The online filter step: from measured state and nominal torque to a safe torque.

:class:`SafetyFilter` is the numeric core that the ROS node, the simulator and replay all
call (no ROS imports here). One :meth:`SafetyFilter.step` (docs/method.md, the filter step):

1. **Validate** ``q``, ``v``, ``u_nom`` (shape ``(n,)``, finite) and reject positions more than
   ``rejection_distance`` beyond a limit (by default half the smallest joint range: no arm
   gets there, so it is a sensor fault), and, while the observer runs, a position that jumped
   farther since the last valid sample than ten periods at speed allow (until it stays for
   three samples). Only such inputs, which cannot be a physical state, are refused; a
   position beyond a limit but within that distance is recovered from (step 4). Rejected
   steps send the *hold* command: gravity compensation at the measured (or last valid)
   position plus damping toward rest, ``g(q) - hold_damping * v`` (no damping when the
   velocity is not valid), clipped to the torque box.
1b. **Model error feedback** (``docs/method.md``, "Model error"): a disturbance observer
   estimates the torque that the arm needs beyond the filter's model (payload, inertia and
   friction errors, the driver's torque error) from the measured velocity change over the last
   period, low-pass filtered with ``observer_time_constant_s``; the estimate is taken out of
   the bias ``h`` of every later step, so the bounds hold for the arm, not only the model.
2. **Convert** the nominal to full torque: with ``gravity_convention='driver_compensated'``
   the driver adds ``g(q)`` itself, so ``u_full = u_nom + g(q)`` here and the output is
   ``u* - g(q)``. The torque box ``|u| <= umax`` always applies to the full torque.
3. **Barriers** at ``(q, v)`` with the certificate's gains give the acceleration bounds
   ``An <= a <= Ap`` (tightened by the certificate's sampling margin).
4. **Outside the safe set S** (some barrier negative) the same bounds ask for a return to S at
   the barrier rate (``db/dt >= -beta alpha2(b) > 0``). The QP meets them with any torque in
   the box; where it cannot, the constructive recovery
   ``a_i = clamp(a_nom_i, max(An_i, -e_i), min(Ap_i, e_i))`` pushes back toward S within the
   usable authority ``e = authority - sampling_margin``; mode ``'recovering'``. The nominal
   is used only when it meets those bounds itself.
5. **Inside S** the QP (:mod:`safety_filter.online.qp_solver`) is solved; its answer is used only
if OSQP
   says solved and the answer passes an explicit constraint check. Otherwise the same
   constructive formula (feasible by construction under the acceleration-authority
   certificate, docs/method.md) is used; mode ``'fallback'`` with the reason. (Under a
   torque-coupling certificate the formula has no such guarantee: its torque is still
   clipped to the box, but the acceleration bounds may then be missed.) When the nominal
   already meets every constraint it is the QP's minimiser and is sent unchanged, without
   a solve (solver status ``'nominal feasible'``).
6. The torque is clipped to the box (in full-torque terms) and converted to the driver's
   convention.

Units: [rad], [rad/s], [rad/s^2], [N m] (prismatic joints: [m], [m/s], [m/s^2], [N]).
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass
from typing import Any

import numpy as np

from safety_filter.core.barriers import BarrierState, evaluate_barriers
from safety_filter.core.certificate import Certificate, CertificateError
from safety_filter.core.dynamics import Dynamics, hold_mass_matrix
from safety_filter.core.model_uncertainty import state_disturbance_bound
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import SafetyFilterError
from safety_filter.online import kernels as _kernels
from safety_filter.online.mode_codes import FilterMode
from safety_filter.online.qp_solver import DEFAULT_EPS, DEFAULT_MAX_ITER, AccelerationQP

GRAVITY_CONVENTIONS = ('full', 'driver_compensated')
_CHECK_REASONS = {
    _kernels.CHECK_PASSED: '',
    _kernels.CHECK_TORQUE: 'answer failed the check: torque outside the box',
    _kernels.CHECK_ACCELERATION: 'answer failed the check: acceleration bound violated',
}
HOLD_TIME_CONSTANT_PERIODS = 20.0  # default hold damping: velocity time constant [periods]
CHECK_TOLERANCE = 1e-6  # relative tolerance of the answer check (times max(1, scale))
MAX_OBSERVER_GAIN = 1.0 / 3.0  # the disturbance observer's largest update per step
JUMP_PERIODS = 10.0  # a position may move this many periods at speed between two samples
JUMP_CONFIRM = 3  # agreeing samples after which a jumped position is accepted


@dataclass(slots=True)
class FilterOutput:
    """Result of one filter step. Arrays have shape (n,), in the model's joint order.

    Attributes:
        torque: torque to send, in the driver's convention [N m]; its full-torque form is
            always inside the torque box.
        mode: which branch produced it (:class:`FilterMode`).
        intervention: ``|u* - u_nom|`` (2-norm, full-torque terms) [N m]; NaN when the
            nominal was invalid.
        barrier_margin: smallest of ``hp, hn, bp, bn`` per joint (negative: outside S);
            NaN when the state was invalid.
        active_upper, active_lower: the acceleration bound ``Ap`` / ``An`` is active.
        torque_saturated: the full torque is at the box.
        solve_time_s: time spent in the QP update and solve [s] (0 when not run).
        solver_status: the solver's status text; ``'nominal feasible'`` when the nominal
            met every constraint (it is then the QP's minimiser and is sent unchanged, no
            solve needed); ``'not run'`` when recovering or rejected.
        reason: why the step was not ``'filtered'``; empty when it was.
    """

    torque: np.ndarray
    mode: FilterMode
    intervention: float
    barrier_margin: np.ndarray
    active_upper: np.ndarray
    active_lower: np.ndarray
    torque_saturated: np.ndarray
    solve_time_s: float
    solver_status: str
    reason: str


class _StepDynamics:
    """``M(q)`` and ``h(q, v)`` written into preallocated arrays (private).

    With Pinocchio behind :class:`Dynamics` it calls CRBA and the nonlinear effects directly:
    :meth:`Dynamics.mass_and_bias` returns new arrays and symmetrises with ``np.triu`` twice,
    which costs several times the dynamics themselves at a 7-joint step. The tests check
    that both give the same numbers.
    """

    def __init__(self, dynamics: Dynamics, hold_s: float | None = None) -> None:
        self.dynamics = dynamics
        # the accelerations are means over this hold (hold_mass_matrix), if set
        self.hold_s = hold_s
        n = dynamics.n
        self._viscous = np.array(dynamics.model.viscous_friction)
        self._coulomb = np.array(dynamics.model.coulomb_friction)
        self._has_friction = bool(np.any(self._viscous != 0.0) or np.any(self._coulomb != 0.0))
        self._friction = np.zeros(n)
        chain = getattr(dynamics, '_pin', None)
        self._pin: Any = None
        if chain is not None and all(hasattr(chain, name) for name in ('_pin', 'model', 'data')):
            self._pin = chain._pin
            self._pin_model = chain.model
            self._pin_data = chain.data

    @property
    def accelerated(self) -> bool:
        """True when the direct Pinocchio path is used."""
        return self._pin is not None

    def mass_and_bias(self, q: np.ndarray, v: np.ndarray, mass_out: np.ndarray,
                      bias_out: np.ndarray) -> None:
        if self._pin is None:
            mass, bias = self.dynamics.mass_and_bias(q, v)
            mass_out[...] = mass
            bias_out[...] = bias
        else:
            _kernels.mirror_upper(self._pin.crba(self._pin_model, self._pin_data, q), mass_out)
            bias_out[...] = self._pin.nonLinearEffects(self._pin_model, self._pin_data, q, v)
            if self._has_friction:
                _kernels.add_friction(v, self._viscous, self._coulomb, self._friction,
                                      bias_out)
        if self.hold_s is not None:
            mass_out[...] = hold_mass_matrix(mass_out, self._viscous, self.hold_s)

    def nominal_acceleration(self, q: np.ndarray, v: np.ndarray, torque: np.ndarray,
                             mass: np.ndarray, bias: np.ndarray,
                             disturbance: np.ndarray | None = None) -> np.ndarray:
        """``M^-1 (torque - h)`` at the state of the last :meth:`mass_and_bias` call (``bias``
        already net of ``disturbance``, which the Pinocchio path adds back to the torque).

        Pinocchio's articulated-body algorithm takes a few microseconds where
        ``np.linalg.solve`` takes tens for these sizes; friction is moved to the torque side.
        """
        if self._pin is None or self.hold_s is not None:
            return np.linalg.solve(mass, torque - bias)
        effort = torque - self._friction if self._has_friction else torque
        if disturbance is not None:
            effort = effort + disturbance
        return np.array(self._pin.aba(self._pin_model, self._pin_data, q, v, effort))

    def rigid_bias(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """``g(q) + C(q, v) v`` without friction."""
        if self._pin is None:
            return self.dynamics.gravity_torque(q) + self.dynamics.coriolis_torque(q, v)
        return np.array(self._pin.nonLinearEffects(self._pin_model, self._pin_data, q, v))

    def friction(self, v: np.ndarray) -> np.ndarray:
        """The model's friction torque at ``v``."""
        return self._viscous * v + self._coulomb * np.sign(v)

    def gravity(self, q: np.ndarray) -> np.ndarray:
        if self._pin is None:
            return self.dynamics.gravity_torque(q)
        return np.array(self._pin.computeGeneralizedGravity(self._pin_model, self._pin_data, q))


def _kernel_input(values: Any) -> np.ndarray:
    """``values`` as a writable C-contiguous float64 array (copied only if it is not one):
    the kernels are compiled for that array type, and any other type would cost a
    compilation inside the control loop."""
    # Not np.ascontiguousarray: it makes a scalar a (1,) array, which would then pass the
    # shape check of a one-joint arm.
    array = np.asarray(values, dtype=float)
    if array.flags.c_contiguous and array.flags.writeable:
        return array
    return array.copy(order='C')


def constructive_acceleration(
    acceleration_nominal: np.ndarray,
    accel_lower: np.ndarray,
    accel_upper: np.ndarray,
    authority: np.ndarray,
    upper_side_worse: np.ndarray | None = None,
) -> np.ndarray:
    """The constructive command (docs/method.md, the filter step) (and the recovery outside S).

    ``a_i = clamp(a_nom_i, max(An_i, -e_i), min(Ap_i, e_i))``. Where the interval is empty
    (only possible outside S, or with a wrong certificate) the end that pushes back toward S
    is taken, within the authority: ``max(min(Ap_i, e_i), -e_i)`` when the upper side's
    barrier is the more negative one (``upper_side_worse``), ``min(max(An_i, -e_i), e_i)``
    otherwise (and when ``upper_side_worse`` is None).

    Args:
        acceleration_nominal: ``a_nom = M^-1 (u_nom - h)`` [rad/s^2], shape (n,).
        accel_lower, accel_upper: ``An``, ``Ap`` [rad/s^2].
        authority: usable authority ``e`` [rad/s^2], positive.
        upper_side_worse: bool per joint, see above.
    """
    low = np.maximum(accel_lower, -authority)
    high = np.minimum(accel_upper, authority)
    acceleration = np.minimum(np.maximum(acceleration_nominal, low), high)
    empty = low > high
    if empty.any():
        push_down = np.maximum(high, -authority)
        push_up = np.minimum(low, authority)
        side = (np.zeros_like(empty) if upper_side_worse is None
                else np.asarray(upper_side_worse, dtype=bool))
        acceleration = np.where(empty, np.where(side, push_down, push_up), acceleration)
    return acceleration


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
        SafetyFilterError: an invalid option.
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
        certificate.check_model(model)
        if not certificate.certified:
            reasons = '; '.join(certificate.reasons) or 'no reason recorded'
            raise CertificateError(f'the certificate is not certified ({reasons}); the filter '
                                   'refuses to run on it')
        if gravity_convention not in GRAVITY_CONVENTIONS:
            raise SafetyFilterError(f'gravity_convention must be one of {GRAVITY_CONVENTIONS}, '
                                    f'got {gravity_convention!r}')
        if rejection_distance is None:
            rejection_distance = 0.5 * float(np.min(certificate.position_upper
                                                    - certificate.position_lower))
        if observer_time_constant_s is None:
            observer_time_constant_s = certificate.observer_time_constants_s
        try:
            time_constants = np.broadcast_to(np.asarray(observer_time_constant_s, dtype=float),
                                             (model.n_joints,)).copy()
        except ValueError as err:
            raise SafetyFilterError('observer_time_constant_s must be a number or one per '
                                    f'joint, got {observer_time_constant_s}') from err
        if not (np.all(np.isfinite(time_constants)) and np.all(time_constants >= 0.0)
                and (np.all(time_constants > 0.0) or np.all(time_constants == 0.0))):
            raise SafetyFilterError('observer_time_constant_s must be finite and > 0 per '
                                    f'joint (or 0: no observer), got {observer_time_constant_s}')
        if not (math.isfinite(rejection_distance) and rejection_distance >= 0.0):
            raise SafetyFilterError(
                f'rejection_distance must be finite and >= 0, got {rejection_distance}')
        n = model.n_joints
        low, high = certificate.payload_mass_range
        if payload_mass is None:
            payload_mass = 0.5 * (float(low) + float(high))
        if not (math.isfinite(payload_mass) and payload_mass >= 0.0):
            raise SafetyFilterError(f'payload_mass must be finite and >= 0, got {payload_mass}')
        usable = np.array(certificate.usable_authority)
        if not np.all(usable > 0.0):
            raise CertificateError('the certificate leaves no usable authority '
                                   '(authority <= sampling_margin) at some joint')

        self.model = model
        self.certificate = certificate
        self.n = n
        self.gravity_convention = gravity_convention
        self.payload_mass = float(payload_mass)
        self.rejection_distance = float(rejection_distance)
        self.dynamics = Dynamics(model, self.payload_mass, backend=backend)
        self._dyn = _StepDynamics(self.dynamics, certificate.acceleration_hold_s)
        self._driver = gravity_convention == 'driver_compensated'

        def frozen(values: Any) -> np.ndarray:
            array = np.array(values, dtype=float)
            array.flags.writeable = False
            return array

        self.torque_limit = frozen(certificate.effort_limit)
        self.usable_authority = frozen(usable)
        self._lower = frozen(certificate.position_lower)
        self._upper = frozen(certificate.position_upper)
        self._gamma = frozen(certificate.gamma)
        self._beta = frozen(certificate.beta)
        self._margin = frozen(certificate.sampling_margin)
        self._alpha1 = certificate.alpha1
        self._alpha2 = certificate.alpha2
        self._accel_tol = frozen(CHECK_TOLERANCE * np.maximum(1.0, usable))
        self._torque_tol = frozen(CHECK_TOLERANCE * np.maximum(1.0, self.torque_limit))
        self._torque_saturation = frozen(self.torque_limit - self._torque_tol)

        q_mid = 0.5 * (self._lower + self._upper)
        mass_mid = self.dynamics.mass_matrix(q_mid)
        if hold_damping is None:
            damping = np.diag(mass_mid) * certificate.control_rate_hz \
                / HOLD_TIME_CONSTANT_PERIODS
        else:
            damping = np.broadcast_to(np.asarray(hold_damping, dtype=float), (n,)).copy()
        if not (np.all(np.isfinite(damping)) and np.all(damping >= 0.0)):
            raise SafetyFilterError(f'hold_damping must be finite and >= 0, got {hold_damping}')
        self.hold_damping = frozen(damping)
        self.observer_time_constant_s = time_constants
        self.observer_time_constant_s.flags.writeable = False
        self._observing = bool(np.all(time_constants > 0.0))
        # The torque that acted over the last period was sent delay + 1 steps ago.
        uncertainty = certificate.uncertainty
        self.observer_delay_periods = int(uncertainty.delay_periods) if uncertainty else 0
        self._obs_sent = np.zeros((self.observer_delay_periods + 1, n))
        self._obs_count = 0
        self._velocity_limit = np.array(certificate.velocity_limit)
        self._position_noise = float(uncertainty.position_noise) if uncertainty else 0.0
        self._jump_candidate: tuple[np.ndarray, int] | None = None
        self._steps_since_valid = 0
        # The range the estimate is kept in: where the certificate's authority accounts for
        # it (docs/method.md); a second model one kilogram heavier gives the payload's share.
        self._disturbance_parameters = certificate.disturbance_parameters
        self._dyn_heavier = (_StepDynamics(Dynamics(model, self.payload_mass + 1.0,
                                                    backend=backend))
                             if self._disturbance_parameters is not None else None)
        self._disturbance = np.zeros(n)  # estimated torque beyond the model [N m]
        self._obs_v = np.zeros(n)  # velocity at the last step
        self._obs_valid = False  # _obs_v belongs to the step before this one
        self._obs_step = np.empty(n)

        acceleration_weights = (None if torque_weights is not None
                                else 1.0 / np.maximum(usable, 1e-9) ** 2)
        self._qp = AccelerationQP(self.torque_limit, torque_weights,
                                  acceleration_weights=acceleration_weights, eps=solver_eps,
                                  max_iter=solver_max_iter, time_limit_s=solver_time_limit_s,
                                  mass_hint=mass_mid)
        self.torque_weights = self._qp.weights
        self.objective = self._qp.objective

        # Private writable copies of the constants for the compiled kernels (one array type).
        self._k_lower = np.array(self._lower)
        self._k_upper = np.array(self._upper)
        self._k_gamma = np.array(self._gamma)
        self._k_beta = np.array(self._beta)
        self._k_margin = np.array(self._margin)
        self._k_speed_bound = np.array(certificate.velocity_bound, dtype=float)
        self._k_speed_beta = np.array(certificate.velocity_beta, dtype=float)
        self._k_accel_bound = np.array(certificate.acceleration_bound, dtype=float)
        self._k_alpha = (_kernels.ALPHA_CODES[self._alpha1.kind], float(self._alpha1.scale),
                         _kernels.ALPHA_CODES[self._alpha2.kind], float(self._alpha2.scale))
        self._k_torque_limit = np.array(self.torque_limit)
        self._k_torque_bound = self.torque_limit + self._torque_tol  # the answer check's box
        self._k_accel_tol = np.array(self._accel_tol)
        self._k_saturation = np.array(self._torque_saturation)
        self._k_authority = np.array(usable)
        self._k_unbounded = np.full(n, np.inf)  # the push back the bounds ask for, in full
        self._k_observer_plausible = 2.0 * np.array(self.torque_limit)

        # Preallocated per-step buffers.
        self._inputs = np.empty((3, n))
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
        self._shape = (n,)
        self.mode_counts: dict[FilterMode, int] = {}
        self.reason_counts: Counter[str] = Counter()
        self.reset()
        self._warm_up(q_mid)
        self.reset()

    def _warm_up(self, q_mid: np.ndarray) -> None:
        """Run every branch of the step once, so that the compiled kernels are loaded (or
        compiled, on a cold cache) now and not at the first control step."""
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
        self._disturbance[:] = 0.0
        self._obs_valid = False
        self._obs_count = 0
        self._jump_candidate = None
        self._steps_since_valid = 0
        self.mode_counts = {mode: 0 for mode in FilterMode}
        self.reason_counts = Counter()
        self.steps = 0

    def statistics(self) -> dict[str, Any]:
        """Counts of steps per mode and of the reasons for non-filtered steps."""
        return {'steps': self.steps,
                'modes': {mode.value: count for mode, count in self.mode_counts.items()},
                'reasons': dict(self.reason_counts)}

    def constraint_bounds(self, q: np.ndarray, v: np.ndarray) -> BarrierState:
        """Barrier values and acceleration bounds at ``(q, v)`` with the certificate's gains
        and sampling margin (docs/method.md); batches of shape (..., n) allowed."""
        c = self.certificate
        return evaluate_barriers(np.asarray(q, dtype=float), np.asarray(v, dtype=float),
                                 c.position_lower, c.position_upper, c.gamma, c.beta,
                                 c.alpha1, c.alpha2, c.sampling_margin, c.velocity_bound,
                                 c.velocity_beta, c.acceleration_bound)

    # ------------------------------------------------------------------ the step
    def _evaluate_barriers(self, q: np.ndarray, v: np.ndarray) -> None:
        """Fill ``_rows = [hp; hn; bp; bn; Ap; An; sp; sn]`` (shape (8, n)) at one state (the
        step does the same inside its first kernel; the tests use this one)."""
        code1, scale1, code2, scale2 = self._k_alpha
        _kernels.barrier_rows(q, v, self._k_lower, self._k_upper, self._k_gamma, self._k_beta,
                              self._k_margin, self._k_speed_bound, self._k_speed_beta,
                              self._k_accel_bound, code1, scale1, code2, scale2, self._rows,
                              np.empty(self.n))

    def _observe(self, q: np.ndarray, v: np.ndarray, mass: np.ndarray, bias: np.ndarray,
                 period_s: float | None) -> None:
        """Update the disturbance estimate and take it out of ``bias`` (in place).

        The arm obeys ``M a + h = u + d`` in the filter's model, with ``d`` the torque that
        the model misses. Over the last period the measured velocity change gives
        ``d ~ M (v - v_prev) / T + h - u_prev``; a first-order low-pass with time constant
        ``observer_time_constant_s`` smooths it (its noise is ``M * velocity noise / time
        constant``, as for a momentum observer). ``u = M a + h - d`` then gives the arm the
        acceleration ``a`` that the barrier bounds were checked for.
        """
        period = self.certificate.control_period_s if period_s is None else float(period_s)
        full = self._obs_count > self.observer_delay_periods
        if self._obs_valid and full and math.isfinite(period) and period > 0.0:
            step = self._obs_step
            np.subtract(v, self._obs_v, out=step)
            step /= period
            measured = mass @ step
            measured += bias
            measured -= self._obs_sent[0]  # what acted: sent delay + 1 steps ago
            # A torque beyond twice the box cannot act on the arm: the two samples are not
            # one period apart (a gap, a reset, a replayed jump); skip them.
            if _kernels.within_box(measured, self._k_observer_plausible):
                # At most 1/3 (a time constant of at least two of the actual periods): then
                # a delay one period longer or shorter than declared cannot make the
                # estimate oscillate (the loop's poles stay inside the unit circle).
                gain = np.minimum(period / (period + self.observer_time_constant_s),
                                  MAX_OBSERVER_GAIN)
                self._disturbance += gain * (measured - self._disturbance)
        # Never beyond what a plant of the declared set can need at this state (so the
        # certified authority holds), and never beyond the torque box.
        limit = self._disturbance_limit(q, v, bias)
        np.clip(self._disturbance, -limit, limit, out=self._disturbance)
        self._obs_v[:] = v
        bias -= self._disturbance

    def _disturbance_limit(self, q: np.ndarray, v: np.ndarray, bias: np.ndarray) -> np.ndarray:
        """Bound of the model error at ``(q, v)`` [N m] (``state_disturbance_bound``)."""
        if self._disturbance_parameters is None or self._dyn_heavier is None:
            return self._k_torque_limit
        constant, link_error, payload_error = self._disturbance_parameters
        rigid = bias - self._dyn.friction(v)
        payload = self._dyn_heavier.rigid_bias(q, v) - rigid
        limit = state_disturbance_bound(constant, link_error, payload_error,
                                        self._dyn.gravity(q), rigid, payload)
        return np.minimum(limit, self._k_torque_limit)

    def _position_jump(self, q: np.ndarray, v: np.ndarray, period_s: float | None) -> str:
        """Why ``q`` cannot follow the last valid position (empty when it can).

        Between two samples a joint moves at most ``JUMP_PERIODS`` periods at the larger of its
        rated and measured speed, per period since the last valid sample, plus ten times the
        declared position noise. A position beyond that is a sensor fault unless it stays:
        after ``JUMP_CONFIRM`` samples that agree with each other it is accepted (a re-homed
        encoder) and the observer starts afresh. Only while the observer runs (the filter then
        reads consecutive steps as one motion).
        """
        period = self.certificate.control_period_s if period_s is None else float(period_s)
        if not (math.isfinite(period) and period > 0.0):
            return ''
        speed = np.maximum(self._velocity_limit, np.abs(v))
        allowed = (JUMP_PERIODS * period * (1 + self._steps_since_valid) * speed
                   + 10.0 * self._position_noise)
        if np.all(np.abs(q - self._last_q) <= allowed):
            self._jump_candidate = None
            return ''
        candidate = self._jump_candidate
        if candidate is not None and np.all(np.abs(q - candidate[0]) <= allowed):
            self._jump_candidate = (q.copy(), candidate[1] + 1)
        else:
            self._jump_candidate = (q.copy(), 1)
        if self._jump_candidate[1] >= JUMP_CONFIRM:
            self._jump_candidate = None
            self._obs_valid = False
            self._obs_count = 0
            return ''
        joints = [self.model.joint_names[i] for i in
                  np.flatnonzero(np.abs(q - self._last_q) > allowed)]
        return (f'position jumped at {", ".join(joints)} farther than the velocity allows '
                'since the last valid sample (a sensor fault unless it stays)')

    @property
    def disturbance_estimate(self) -> np.ndarray:
        """The observer's estimate of the torque the model misses [N m], shape (n,)."""
        return self._disturbance.copy()

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
            q_in = _kernel_input(q)
            v_in = _kernel_input(v)
            u_in = _kernel_input(u_nom)
        except (TypeError, ValueError) as err:
            return self._reject(q, v, f'input is not numeric: {err}', 'input not numeric')
        shape = self._shape
        if q_in.shape != shape or v_in.shape != shape or u_in.shape != shape:
            return self._reject(q, v, f'expected arrays of shape {shape}, got q {q_in.shape}, '
                                f'v {v_in.shape}, u_nom {u_in.shape}', 'wrong shape')
        inputs = self._inputs
        out_real = np.empty((2, self.n))  # [torque; barrier margin], returned to the caller
        out_flags = np.empty((3, self.n), dtype=bool)  # [active upper; active lower; saturated]
        torque, barrier_margin = out_real[0], out_real[1]
        code1, scale1, code2, scale2 = self._k_alpha
        flags, worst, deepest = _kernels.stage_and_bound(
            q_in, v_in, u_in, inputs, self._k_lower, self._k_upper, self._k_gamma, self._k_beta,
            self._k_margin, self._k_speed_bound, self._k_speed_beta, self._k_accel_bound, code1,
            scale1, code2, scale2, self._rows, barrier_margin)
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
            jumped = self._position_jump(q, v, period_s)
            if jumped:
                return self._reject(q, v, jumped, 'position jump', position=self._last_q.copy(),
                                    barrier_margin=barrier_margin, u_nom=u_nom_in)
        self._last_q[:] = q
        self._has_last_q = True
        self._steps_since_valid = 0

        mass, bias = self._mass, self._bias
        self._dyn.mass_and_bias(q, v, mass, bias)
        if self._observing:
            self._observe(q, v, mass, bias, period_s)
        gravity = self._no_gravity
        if self._driver:
            gravity = self._dyn.gravity(q)
            u_full = np.add(u_nom_in, gravity, out=self._torque_full)
        else:
            u_full = u_nom_in
        accel_upper = self._accel_upper
        accel_lower = self._accel_lower
        self._a_nom = None

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
            outside = [self.model.joint_names[i] for i in range(self.n)
                       if barrier_margin[i] < 0.0]
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
            solve_time = result.solve_time_s
            status = result.status
            failed = ''
            if result.solved:
                acceleration = result.acceleration
                check = _kernels.torque_and_check(
                    mass, bias, acceleration, accel_lower, accel_upper, self._k_torque_bound,
                    self._k_accel_tol, torque)
                failed = _CHECK_REASONS[check]
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
                acceleration = self._push_back_harder(acceleration, mass, bias)
        if not have_torque:
            _kernels.torque_and_check(mass, bias, acceleration, accel_lower, accel_upper,
                                      self._k_torque_bound, self._k_accel_tol, torque)
            if not math.isfinite(torque @ torque):  # only with a broken model: never send NaN
                return self._reject(q, v, 'the dynamics gave non-finite numbers',
                                    'non-finite dynamics', position=q,
                                    barrier_margin=barrier_margin)
        intervention = _kernels.finish(torque, u_full, acceleration, accel_lower, accel_upper,
                                       self._k_torque_limit, self._k_accel_tol,
                                       self._k_saturation, gravity, self._driver, out_flags)
        if self._observing:
            sent = self._obs_sent
            if len(sent) > 1:
                sent[:-1] = sent[1:]
            np.add(torque, gravity, out=sent[-1])
            self._obs_count += 1
            self._obs_valid = True
        self.steps += 1
        self.mode_counts[mode] += 1
        if key:
            self.reason_counts[key] += 1
        return FilterOutput(torque, mode, intervention, barrier_margin, out_flags[0],
                            out_flags[1], out_flags[2], solve_time, status, reason)

    def _nominal_feasible(self, u_full: np.ndarray) -> bool:
        """Whether the nominal (full torque) meets the box and the acceleration bounds.

        Checks the box first, which rules out far-off nominals without a linear solve. Sets
        ``_a_nom`` when it gets to compute it.
        """
        if not _kernels.within_box(u_full, self._k_torque_limit):
            return False
        a_nom = self._nominal_acceleration(u_full)
        return _kernels.within_bounds(a_nom, self._accel_lower, self._accel_upper)

    def _nominal_acceleration(self, u_full: np.ndarray) -> np.ndarray:
        """``a_nom = M^-1 (u_nom - h)`` at the current state (cached per step)."""
        if self._a_nom is None:
            inputs = self._inputs
            try:
                self._a_nom = self._dyn.nominal_acceleration(
                    inputs[0], inputs[1], u_full, self._mass, self._bias,
                    self._disturbance if self._observing else None)
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

    def _push_back_harder(self, cautious: np.ndarray, mass: np.ndarray, bias: np.ndarray
                          ) -> np.ndarray:
        """Outside S, where the QP cannot meet the barriers' bounds: from the constructive
        command (within the certified authority, which is what every joint is guaranteed at
        once in the worst configuration) toward what the bounds ask, as far as the torque box
        allows at this state (bisection on the segment between the two)."""
        wanted = np.empty(self.n)
        _kernels.constructive(self._a_nom if self._a_nom is not None else cautious,
                              self._accel_lower, self._accel_upper, self._k_unbounded,
                              self._rows, wanted)
        limit = self._k_torque_limit

        def fits(acceleration: np.ndarray) -> bool:
            return _kernels.within_box(mass @ acceleration + bias, limit)

        if not fits(cautious):
            return cautious
        if fits(wanted):
            return wanted
        step = wanted - cautious
        low, high = 0.0, 1.0
        for _ in range(12):  # to 1/4096 of the way
            middle = 0.5 * (low + high)
            if fits(cautious + middle * step):
                low = middle
            else:
                high = middle
        return cautious + low * step

    def _valid_position(self, q: Any) -> np.ndarray | None:
        try:
            position = np.array(q, dtype=float)
        except (TypeError, ValueError):
            return None
        if position.shape != self._shape or not np.all(np.isfinite(position)):
            return None
        distance = self.rejection_distance
        if np.any(position < self._lower - distance) or np.any(position > self._upper + distance):
            return None
        return position

    def _hold_full(self, position: np.ndarray, v: Any) -> tuple[np.ndarray, np.ndarray]:
        """Full-torque hold command ``clip(g(q) - hold_damping v)`` and ``g(q)``."""
        n = self.n
        gravity = self._dyn.gravity(np.array(position, dtype=float))
        damping = np.zeros(n)
        try:
            velocity = np.asarray(v, dtype=float)
            if velocity.shape == (n,):
                damping = np.where(np.isfinite(velocity), -self.hold_damping * velocity, 0.0)
        except (TypeError, ValueError):
            pass
        full = np.clip(gravity + damping, -self.torque_limit, self.torque_limit)
        return full, gravity

    def hold_torque(self, q: Any, v: Any) -> np.ndarray:
        """The hold command at ``(q, v)`` in the driver's convention, without a filter step.

        Gravity compensation plus damping toward rest, inside the torque box; what a
        rejected step sends, and what the node uses in place of a stale nominal or after its
        joint-state watchdog trips. Uses the last valid position when ``q`` is invalid, and
        zero torque when there has never been one.
        """
        position = self._valid_position(q)
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
        n = self.n
        if position is None:
            position = self._valid_position(q)
            if position is not None:
                self._last_q[:] = position
                self._has_last_q = True
        if position is None and self._has_last_q:
            position = self._last_q
        torque = np.zeros(n)
        saturated = np.zeros(n, dtype=bool)
        intervention = math.nan
        if position is not None:
            full, gravity = self._hold_full(position, v)
            if u_nom is not None:
                nominal_full = u_nom + gravity if self._driver else u_nom
                intervention = float(np.linalg.norm(full - nominal_full))
            saturated = np.abs(full) >= self.torque_limit - self._torque_tol
            torque = full - gravity if self._driver else full
        if barrier_margin is None:
            barrier_margin = np.full(n, math.nan)
        false = np.zeros(n, dtype=bool)
        self._obs_valid = False
        self._obs_count = 0
        self._steps_since_valid += 1
        self.steps += 1
        self.mode_counts[FilterMode.REJECTED] += 1
        self.reason_counts[key] += 1
        return FilterOutput(torque, FilterMode.REJECTED, intervention, barrier_margin,
                            false, false.copy(), saturated, 0.0, 'not run', reason)
