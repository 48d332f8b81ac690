"""The sampled-data margin: acceleration reserved for what happens within one hold period.

The filter computes a torque at each control step and the driver holds it until the next one
(after the declared delay). Within that hold the acceleration the torque produces drifts
(``M`` and ``h`` change with the state), while the barrier argument of docs/method.md is
made in continuous time. What the guarantee needs is that the safe set S stays invariant
under the sampled filter: from every state of S, under every command the filter may send
there, the state stays in S until the next step (where the QP is feasible again, by the
certificate). The filter enforces the bounds tightened by a margin ``delta`` [rad/s^2]::

    An + delta <= a(t_k) <= Ap - delta

so a command at a tightened bound starts the velocity barrier it touches rising at the rate
``delta``; ``delta`` must be large enough that no barrier is negative anywhere in the hold.

A worst-case analytic bound on the drift is far too conservative, so it is estimated from
rollouts: states sampled in S (half of them on its boundary), commands the filter could
send there (inside the tightened bounds, often at an edge, with the torque inside its box),
the torque held while the model (and arms drawn from the declared uncertainty set) are
integrated with RK4, and each velocity barrier checked along the way; what it lacks, as a
rate, is added to the margin with an inflation factor. The hold covers ``sampling_factor``
control periods plus the declared delay, so a controller that runs that much slower is
still covered.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from safety_filter.core.barriers import BarrierState, evaluate_barriers, safe_velocity_interval
from safety_filter.core.class_k import ClassK
from safety_filter.core.dynamics import (
    christoffel_batch,
    hold_mass_matrix,
    mass_matrix_batch,
    rnea_batch,
)
from safety_filter.core.friction import friction_torque
from safety_filter.core.payload_affine import payload_affine_batch
from safety_filter.core.robot_model import RobotModel
from safety_filter.online.delay_prediction import stop_at_rest


@dataclass(frozen=True)
class Gains:
    """Per-joint barrier gains and the class-K families (arrays of shape (n,))."""

    gamma: np.ndarray
    beta: np.ndarray
    alpha1: ClassK
    alpha2: ClassK
    speed_bound: np.ndarray | None = None  # vS of the velocity barriers (None: none)
    speed_beta: np.ndarray | None = None  # their rate beta_v [1/s]
    accel_bound: np.ndarray | None = None  # |a| the filter allows [rad/s^2] (None: any)

    def barriers(self, model: RobotModel, q: np.ndarray, v: np.ndarray,
                 margin: np.ndarray | float) -> BarrierState:
        """:func:`evaluate_barriers` with these gains and ``model``'s position limits."""
        return evaluate_barriers(q, v, model.position_lower, model.position_upper, self.gamma,
                                 self.beta, self.alpha1, self.alpha2, margin, self.speed_bound,
                                 self.speed_beta, self.accel_bound)


class BatchPlant:
    """Batched forward dynamics with a per-sample payload mass.

    With a few distinct payload masses, each group is evaluated with its own model; with
    many, ``M`` and ``h`` are evaluated at zero and unit payload and combined (both are
    affine in the payload mass: ``safety_filter.core.payload_affine``).
    """

    def __init__(self, model: RobotModel, payload_mass: np.ndarray) -> None:
        self.model = model
        self.mass = np.asarray(payload_mass, dtype=float)
        self.viscous = np.array(model.viscous_friction)
        self.coulomb = np.array(model.coulomb_friction)
        # Coulomb friction's direction per sample, when held (None: sign(v) at each call).
        self.coulomb_direction: np.ndarray | None = None
        levels = np.unique(self.mass)
        self._groups = ([(level, self.mass == level) for level in levels]
                        if len(levels) <= 4 else None)

    def _evaluate(self, function, *args: np.ndarray) -> np.ndarray:  # noqa: ANN001
        if self._groups is not None:
            out = None
            for level, mask in self._groups:
                part = function(self.model, *(x[mask] for x in args), payload_mass=level)
                if out is None:
                    out = np.empty((len(self.mass),) + part.shape[1:])
                out[mask] = part
            return out
        return payload_affine_batch(function, self.model, *args, payload_mass=self.mass)

    def mass_matrix(self, q: np.ndarray) -> np.ndarray:
        """``M(q)`` per sample, shape (N, n, n)."""
        return self._evaluate(mass_matrix_batch, q)

    def bias(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """``h(q, v)`` per sample, shape (N, n)."""
        rigid = self._evaluate(lambda model, x, y, payload_mass: rnea_batch(
            model, x, y, payload_mass=payload_mass), q, v)
        return rigid + friction_torque(v, self.viscous, self.coulomb, self.coulomb_direction)

    def acceleration(self, q: np.ndarray, v: np.ndarray, u: np.ndarray) -> np.ndarray:
        """``M^-1 (u - h)`` per sample."""
        return np.linalg.solve(self.mass_matrix(q), (u - self.bias(q, v))[..., None])[..., 0]

    def coriolis_jacobian(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """``d(C(q, v) v)/dv = 2 Gamma(q) v`` per sample, shape (N, n, n)."""
        return 2.0 * np.einsum('nijk,nk->nij', self._evaluate(christoffel_batch, q), v)


def sampled_inverse_mass(model: RobotModel, samples: int = 64) -> np.ndarray:
    """``M^-1`` at configurations sampled in the joint box (seeded), with the lightest
    payload, shape (samples, n, n): where damping acts fastest."""
    rng = np.random.default_rng(0)
    q = rng.uniform(model.position_lower, model.position_upper, (samples, model.n_joints))
    return np.linalg.inv(mass_matrix_batch(model, q, payload_mass=model.payload.mass_min))


def _damping_rate(model: RobotModel) -> float:
    """An estimate of the fastest damping mode ``max eig(M^-1 D)`` [1/s] of ``model``:
    the largest row sum of ``|M^-1| D`` over sampled configurations, doubled for what the
    samples miss."""
    viscous = np.array(model.viscous_friction)
    if not np.any(viscous > 0.0):
        return 0.0
    inverse = sampled_inverse_mass(model)
    return 2.0 * float(np.max(np.sum(np.abs(inverse) * viscous, axis=2)))


class _GroupedPlant:
    """Several :class:`BatchPlant` s, each for the samples of its group."""

    def __init__(self, parts: list[BatchPlant], group: np.ndarray) -> None:
        self.parts = parts
        self.masks = [group == k for k in range(len(parts))]

    def _combine(self, method: str, *args: np.ndarray) -> np.ndarray:
        out = None
        for part, mask in zip(self.parts, self.masks):
            if not mask.any():
                continue
            value = getattr(part, method)(*(x[mask] for x in args))
            if out is None:
                out = np.empty((len(mask),) + value.shape[1:])
            out[mask] = value
        return out

    def hold_coulomb_direction(self, v: np.ndarray) -> None:
        """Hold each sample's Coulomb friction at its direction for velocities ``v``."""
        for part, mask in zip(self.parts, self.masks):
            part.coulomb_direction = np.sign(v[mask])

    def mass_matrix(self, q: np.ndarray) -> np.ndarray:
        return self._combine('mass_matrix', q)

    def bias(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        return self._combine('bias', q, v)

    def acceleration(self, q: np.ndarray, v: np.ndarray, u: np.ndarray) -> np.ndarray:
        return self._combine('acceleration', q, v, u)

    def coriolis_jacobian(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        return self._combine('coriolis_jacobian', q, v)


def sample_safe_states(
    model: RobotModel, gains: Gains, count: int, rng: np.random.Generator,
    boundary_fraction: float = 0.5,
) -> tuple[np.ndarray, np.ndarray]:
    """States in the safe set S; ``boundary_fraction`` of the joints' velocities on b = 0.

    Positions: uniform over the joint box, with a third drawn close to a limit.
    Velocities: inside each joint's slice of S, either uniform or on one of its two edges.
    """
    n = model.n_joints
    lower, upper = np.array(model.position_lower), np.array(model.position_upper)
    span = upper - lower
    u = rng.random((count, n))
    near = rng.random((count, n)) < 1.0 / 3.0
    edge = np.where(rng.random((count, n)) < 0.5, 0.0, 1.0)
    closeness = rng.random((count, n)) ** 4
    fraction = np.where(near, np.abs(edge - closeness), u)
    q = lower + fraction * span
    v_lo, v_hi = safe_velocity_interval(q, lower, upper, gains.gamma, gains.alpha1,
                                        gains.speed_bound, gains.speed_beta)
    t = rng.random((count, n))
    on_edge = rng.random((count, n)) < boundary_fraction
    t = np.where(on_edge, np.where(rng.random((count, n)) < 0.5, 0.0, 1.0), t)
    v = v_lo + t * (v_hi - v_lo)
    return q, v


def estimate_sampling_margin(
    model: RobotModel,
    gains: Gains,
    hold_period_s: float,
    samples: int = 2000,
    substeps: int = 2,
    inflation: float = 1.5,
    current_margin: np.ndarray | None = None,
    acceleration_envelope: np.ndarray | None = None,
    seed: int = 0,
    plants: Sequence[tuple[RobotModel, float]] = (),
    acceleration_hold_s: float = 0.0,
    coulomb_held: bool = True,
    prediction_s: float = 0.0,
    lookahead_s: float = 0.0,
    delay_s: float = 0.0,
) -> np.ndarray:
    """Acceleration margin ``delta`` [rad/s^2] per joint covering one hold period.

    Each sampled state of S and command (inside the bounds tightened by ``current_margin``,
    often at their edge) is rolled out under the held torque; at every substep each
    velocity barrier must still be non-negative. Where one is negative, ``-b / t`` is the
    initial rate it lacked. The result is ``current_margin`` plus ``inflation`` times the
    largest such shortfall per joint: equal to ``current_margin`` when it already suffices.

    Args:
        model: the robot model (payload masses are sampled over its payload range).
        gains: the barrier gains the filter will use.
        hold_period_s: the longest hold period to cover [s].
        samples: rolled-out states.
        substeps: RK4 steps per hold period (the drift is tracked at each step's end).
        inflation: factor applied to the largest drift found (>= 1).
        current_margin: margin the commanded accelerations already respect.
        acceleration_envelope: per-joint bound on the commanded acceleration that the
            filter enforces, if any [rad/s^2].
        seed: random seed.
        plants: arms unlike the model, ``(model, payload mass)`` each (drawn from the
            declared uncertainty set): the samples are shared between the model (with
            payloads over its range) and these.
        acceleration_hold_s: when positive, the commanded accelerations are means over a
            hold of this length (``u = M_hold a + h``,
            :func:`~safety_filter.core.dynamics.hold_mass_matrix` with the model's viscous
            damping, as the filter computes them) instead of initial accelerations
            (``u = M a + h``); the rollouts still last ``hold_period_s``.
        coulomb_held: hold each joint's Coulomb friction at its direction at the sample
            (physical, see below); False re-evaluates ``sign(v)`` within the hold, as if
            friction could push a joint on through zero velocity (only to report what the
            one-sided treatment gives back).
        prediction_s: when positive, the declared delay that the filter predicts over: the
            sampled command acts for this long, then a command planned at the state the
            filter predicts (from the sample, with ``M`` and ``h`` frozen there) acts on the
            arm's actual state for ``hold_period_s``; both are checked, with the shortfall
            as a rate from the sample's time.
        delay_s: when positive (and nothing is predicted), the declared delay as an upper
            bound, part of ``hold_period_s``: besides the command held for the whole hold
            from the sample, the command acting only after ``delay_s``, while one drawn at
            the sample as the earlier command acts before it, is rolled out too.
        lookahead_s: when positive, each command is the torque for its acceleration at the
            state this much later (``lookahead_position``), as the filter computes it with
            a certificate's ``lookahead_s``.
    """
    rng = np.random.default_rng(seed)
    n = model.n_joints
    umax = np.array(model.effort_limit)
    margin = np.zeros(n) if current_margin is None else np.asarray(current_margin, float)
    q, v = sample_safe_states(model, gains, samples, rng)
    # Three payload levels (both ends and the middle) keep the rollouts to one model
    # evaluation per sample; the drift is smooth in the payload mass.
    levels = np.linspace(model.payload.mass_min, model.payload.mass_max, 3)
    payload = levels[rng.integers(0, 3, samples)]
    group = rng.integers(0, len(plants) + 1, samples)  # 0: the model itself
    plant = _GroupedPlant([BatchPlant(model, payload[group == 0])]
                          + [BatchPlant(other, np.full(int(np.sum(group == k + 1)), mass))
                             for k, (other, mass) in enumerate(plants)], group)
    if acceleration_envelope is None:
        acceleration_envelope = gains.accel_bound
    commands = _Commands(model, gains, plant, umax, margin, acceleration_envelope,
                         acceleration_hold_s, lookahead_s, rng)
    torque, commanded, accel0, sendable = commands.draw(q, v)
    # What is checked (docs/method.md, sampled data): that the state stays in S for the
    # whole hold. S is invariant under the sampled filter when every state of S, under every
    # command the filter may send there, stays in S until the next step (where the QP is
    # feasible again). A command at the tightened bound starts each velocity barrier that it
    # touches rising at the rate ``delta``; a barrier b that is negative at time t asks for
    # ``-b / t`` more initial rate: so much more margin.
    shortfall = np.zeros(n)
    # RK4 is stable for step * rate <= 2.78; the fastest damping mode of the arms is at most
    # max |M^-1| D (row sums): take enough substeps for it.
    rate = max([_damping_rate(model), *(_damping_rate(other) for other, _ in plants)])
    substeps = max(substeps, int(math.ceil(hold_period_s * rate / 2.0)))
    rollout = _Rollout(model, gains, plant, hold_period_s / substeps, acceleration_hold_s,
                       coulomb_held, shortfall)
    if prediction_s > 0.0:
        # The command planned at the sample acts over the delay; the filter predicts the
        # state at its end (M and h frozen at the sample, as the filter step does: with the
        # observer caught up, the commanded acceleration is its prediction) and plans the
        # next command there, which then acts on the arm's actual state for one hold.
        q1, v1 = rollout.run(q, v, torque, accel0, prediction_s, 0.0, sendable)
        q_plan = q + prediction_s * v + (0.5 * prediction_s ** 2) * commanded
        v_plan = v + prediction_s * commanded
        stop_at_rest(q, v, q_plan, v_plan, np.array(model.coulomb_friction) > 0.0,
                     prediction_s)
        # Coulomb friction as the filter plans it there, at the predicted direction, and held
        # so over the hold (where the arm's velocity has the other sign it is within the
        # prediction's error of zero, and real friction there only slows the joint).
        if coulomb_held:
            plant.hold_coulomb_direction(v_plan)
        torque, _, _, planned = commands.draw(q_plan, v_plan)
        sendable = sendable & planned
        rollout.run(q1, v1, torque, plant.acceleration(q1, v1, torque), hold_period_s,
                    prediction_s, sendable, coulomb_velocity=v_plan)
    else:
        rollout.run(q, v, torque, accel0, hold_period_s, 0.0, sendable)
        if 0.0 < delay_s < hold_period_s:
            # A delay up to delay_s: the command may also start only after it, while the one
            # sent a step earlier (any the filter could send at the sample) still acts; it
            # then acts, planned at the sample, on the state that one brought about.
            earlier, _, earlier_accel0, earlier_sendable = commands.draw(q, v)
            q1, v1 = rollout.run(q, v, earlier, earlier_accel0, delay_s, 0.0,
                                 earlier_sendable)
            rollout.run(q1, v1, torque, plant.acceleration(q1, v1, torque),
                        hold_period_s - delay_s, delay_s, sendable & earlier_sendable)
    return margin + inflation * shortfall


def lookahead_position(model: RobotModel, q: np.ndarray, v: np.ndarray, lookahead_s: float
                       ) -> np.ndarray:
    """Where the filter evaluates ``M`` and ``h`` for ``(q, v)`` with a certificate's
    ``lookahead_s`` ``c`` (``StepDynamics.evaluation_position``): ``q + c v`` within the
    position limits; batches of shape (..., n). The torque for an acceleration ``a`` is then
    ``u = M(q_c) a + h(q_c, v) + c J a``, ``J = d(C v)/dv`` at ``(q_c, v)``: to first order in
    ``c`` the torque that gives ``a`` at ``(q + c v, v + c a)``, the middle of the hold
    (docs/method.md, "Lookahead")."""
    return np.clip(q + lookahead_s * v, model.position_lower, model.position_upper)


class _Commands:
    """Commands the filter may send at a state: accelerations inside its bounds (tightened
    by the margin; the bounds' corners and interior), the torque pulled into the box."""

    def __init__(self, model: RobotModel, gains: Gains, plant: _GroupedPlant, umax: np.ndarray,
                 margin: np.ndarray, envelope: np.ndarray | None, acceleration_hold_s: float,
                 lookahead_s: float, rng: np.random.Generator) -> None:
        self.model, self.gains, self.plant, self.umax = model, gains, plant, umax
        self.margin, self.envelope, self.rng = margin, envelope, rng
        self.acceleration_hold_s = acceleration_hold_s
        self.lookahead_s = lookahead_s

    def draw(self, q: np.ndarray, v: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """``(torque, commanded, initial acceleration, sendable)`` per sample: the commanded
        acceleration is the mean over the hold in the mean form; a sample whose clipped
        torque leaves the bounds is not a command the filter sends."""
        samples, n = q.shape
        bounds = self.gains.barriers(self.model, q, v, self.margin)
        lo = np.minimum(bounds.accel_lower, bounds.accel_upper)
        hi = np.maximum(bounds.accel_lower, bounds.accel_upper)
        if self.envelope is not None:
            lo = np.clip(lo, -self.envelope, self.envelope)
            hi = np.clip(hi, -self.envelope, self.envelope)
        pick = self.rng.random((samples, n))
        corner = self.rng.random((samples, n)) < 0.5
        pick = np.where(corner, np.round(pick), pick)
        accel = lo + pick * (hi - lo)
        mass = self.plant.mass_matrix(q)
        bias = self.plant.bias(q, v)
        ahead = self.lookahead_s > 0.0
        # the filter's M and h: at the position ahead along the velocity, with a lookahead
        planned_mass, planned_bias = mass, bias
        position = q
        if ahead:
            position = lookahead_position(self.model, q, v, self.lookahead_s)
            planned_mass = self.plant.mass_matrix(position)
            planned_bias = self.plant.bias(position, v)
        mean_over_hold = self.acceleration_hold_s > 0.0
        commanding = (hold_mass_matrix(planned_mass, self.model.viscous_friction,
                                       self.acceleration_hold_s) if mean_over_hold
                      else planned_mass)
        if ahead:  # and the velocity ahead: h(q_ahead, v + lookahead a) to first order
            commanding = commanding + self.lookahead_s * self.plant.coriolis_jacobian(
                position, v)
        torque = np.einsum('nij,nj->ni', commanding, accel) + planned_bias
        torque = np.clip(torque, -self.umax, self.umax)
        commanded = np.linalg.solve(commanding, (torque - planned_bias)[..., None])[..., 0]
        accel0 = (np.linalg.solve(mass, (torque - bias)[..., None])[..., 0]
                  if mean_over_hold or ahead else commanded)
        tolerance = 1e-9 * (1.0 + np.abs(hi) + np.abs(lo))
        sendable = np.all((commanded >= lo - tolerance) & (commanded <= hi + tolerance), axis=1)
        return torque, commanded, accel0, sendable


class _Rollout:
    """Held torques integrated with RK4; each velocity barrier's shortfall, as a rate from
    the sample's time, raised into ``shortfall`` (shape (n,), in place)."""

    def __init__(self, model: RobotModel, gains: Gains, plant: _GroupedPlant, step_s: float,
                 acceleration_hold_s: float, coulomb_held: bool, shortfall: np.ndarray) -> None:
        self.model, self.gains, self.plant = model, gains, plant
        self.step_s = step_s
        self.acceleration_hold_s = acceleration_hold_s
        self.coulomb_held = coulomb_held
        self.shortfall = shortfall

    def run(self, q: np.ndarray, v: np.ndarray, torque: np.ndarray, accel0: np.ndarray,
            duration: float, elapsed: float, sendable: np.ndarray,
            coulomb_velocity: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Hold ``torque`` for ``duration`` from ``(q, v)``, ``elapsed`` after the sample, with
        Coulomb friction held at the direction of ``coulomb_velocity`` (default ``v``);
        returns the state at the end."""
        plant = self.plant
        # Coulomb friction is held at its direction at the start for the whole hold (the
        # torque compensates it exactly, as where it was planned): friction only ever
        # opposes the motion, and where a joint's velocity reaches zero within the hold,
        # friction that sticks it or reverses would slow it further than the held friction
        # does (docs/method.md, dissipation); ``sign(v)`` re-evaluated would flip it at zero
        # velocity, which no physical friction does.
        if self.coulomb_held:
            plant.hold_coulomb_direction(v if coulomb_velocity is None else coulomb_velocity)
        substeps = max(1, int(math.ceil(duration / self.step_s - 1e-9)))
        # With mean accelerations over a control period the velocity barriers are checked
        # where the filter acts again, at the ends of the periods within the hold (between
        # them the damped response is front-loaded: the plan holds at the period's end, not
        # within it); the positions at every substep.
        periods = (max(1, round(duration / self.acceleration_hold_s))
                   if self.acceleration_hold_s > 0.0 else 0)
        if periods:
            substeps = periods * int(math.ceil(substeps / periods))
        dt = duration / substeps
        qk, vk = q, v
        k1v = accel0
        for step in range(1, substeps + 1):
            k1q = vk
            k2v = plant.acceleration(qk + 0.5 * dt * k1q, vk + 0.5 * dt * k1v, torque)
            k2q = vk + 0.5 * dt * k1v
            k3v = plant.acceleration(qk + 0.5 * dt * k2q, vk + 0.5 * dt * k2v, torque)
            k3q = vk + 0.5 * dt * k2v
            k4v = plant.acceleration(qk + dt * k3q, vk + dt * k3v, torque)
            k4q = vk + dt * k3v
            qk = qk + dt / 6.0 * (k1q + 2 * k2q + 2 * k3q + k4q)
            vk = vk + dt / 6.0 * (k1v + 2 * k2v + 2 * k3v + k4v)
            k1v = plant.acceleration(qk, vk, torque)  # the acceleration now; next step's k1
            if not sendable.any():
                continue
            now = self.gains.barriers(self.model, qk, vk, 0.0)
            time = elapsed + step * dt
            if not periods or step % (substeps // periods) == 0:
                lowest = np.minimum(np.minimum(now.barrier_upper, now.barrier_lower),
                                    np.minimum(now.speed_upper, now.speed_lower))
                np.maximum(self.shortfall, np.max(-lowest[sendable], axis=0) / time,
                           out=self.shortfall)
            if periods:
                # a position short by x at time t lacked 2 x / t^2 of acceleration
                position = np.minimum(now.margin_upper, now.margin_lower)
                np.maximum(self.shortfall, 2.0 * np.max(-position[sendable], axis=0)
                           / time ** 2, out=self.shortfall)
        return qk, vk
