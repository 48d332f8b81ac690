"""The falsifier: an independent check that the QP is feasible where the certificate says so.

It shares nothing with the certification's reasoning (no bounds, no authorities): it samples
states in the safe set S, dense near the barrier boundaries and the position limits, and
payload masses in the certified range; evaluates the true ``M`` and ``h`` there; and decides
the exact feasibility problem

    exists u with |u| <= umax and An + delta <= M^-1 (u - h) <= Ap - delta

(docs/method.md; ``M`` is the mass matrix of the mean acceleration over the hold where the
certificate bounds those, ``dynamics.hold_mass_matrix``). Two cheap witnesses are tried
first for every state (the acceleration nearest zero inside the bounds, and the one nearest
free fall); a witness whose torque is inside the box proves feasibility. Every state where
both witnesses fail, and the states where they have the least slack, go to an exact linear
program solved by HiGHS through SciPy - a solver the filter does not use. The smallest LP
slack is reported as a fraction of the torque limits.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import linprog

from safety_filter.certification.sampled_data_margin import (
    BatchPlant,
    Gains,
    lookahead_position,
    sample_safe_states,
)
from safety_filter.core.certificate import Certificate
from safety_filter.core.dynamics import hold_mass_matrix
from safety_filter.core.friction import friction_torque
from safety_filter.core.model_uncertainty import state_disturbance_bound
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import SolverError


@dataclass
class FalsifierResult:
    """What the falsifier found.

    Attributes:
        states: states sampled in S.
        lp_solved: states decided by the exact LP.
        infeasible: states where no admissible torque meets the bounds.
        min_slack: smallest LP slack found, as a fraction of the torque limits (negative
            means infeasible); ``witness_min_slack`` the smallest slack of the witnesses.
        worst_states: the states with the smallest slack (q, v, payload, slack), for reports.
    """

    states: int
    lp_solved: int
    infeasible: int
    min_slack: float
    witness_min_slack: float
    worst_states: list[dict[str, object]] = field(default_factory=list)

    def summary(self) -> dict[str, object]:
        """JSON-ready summary (stored in the certificate)."""
        return {'states': self.states, 'lp_solved': self.lp_solved,
                'infeasible': self.infeasible, 'min_slack': round(self.min_slack, 9),
                'witness_min_slack': round(self.witness_min_slack, 9),
                'worst_states': self.worst_states[:5]}


def _lp_slack(mass: np.ndarray, bias: np.ndarray, lower: np.ndarray, upper: np.ndarray,
              umax: np.ndarray) -> float:
    """Largest s with An' <= a <= Ap' and |M a + h| <= umax (1 - s); -inf if none."""
    n = len(bias)
    if np.any(lower > upper):
        return -np.inf
    # Variables (a, s); maximise s.
    scaled = mass / umax[:, None]
    a_ub = np.vstack([np.hstack([scaled, np.ones((n, 1))]),
                      np.hstack([-scaled, np.ones((n, 1))])])
    b_ub = np.concatenate([1.0 - bias / umax, 1.0 + bias / umax])
    c = np.zeros(n + 1)
    c[-1] = -1.0
    bounds = [(lo, hi) for lo, hi in zip(lower, upper)] + [(None, 1.0)]
    result = linprog(c, A_ub=a_ub, b_ub=b_ub, bounds=bounds, method='highs')
    if result.status == 2:
        return -np.inf
    if result.status != 0:
        raise SolverError(f"the falsifier's reference LP failed: {result.message}")
    return float(result.x[-1])


def _disturbance_estimates(model: RobotModel, plant: BatchPlant, payload: np.ndarray,
                           q: np.ndarray, v: np.ndarray, bias: np.ndarray,
                           parameters: tuple[np.ndarray, float, float] | None,
                           umax: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Disturbance estimates the filter may hold at each state: mostly at the corners of its
    range (``state_disturbance_bound``), else inside; zero for certificates without one."""
    if parameters is None:
        return np.zeros_like(bias)
    constant, link_error, payload_error = parameters
    friction = friction_torque(v, plant.viscous, plant.coulomb)
    rigid = bias - friction
    gravity = plant.bias(q, np.zeros_like(v))
    heavier = BatchPlant(model, payload + 1.0).bias(q, v) - friction
    limit = np.minimum(state_disturbance_bound(constant, link_error, payload_error, gravity,
                                               rigid, heavier - rigid), umax)
    corner = rng.random(bias.shape) < 0.7
    side = np.where(corner, np.where(rng.random(bias.shape) < 0.5, -1.0, 1.0),
                    rng.uniform(-1.0, 1.0, bias.shape))
    return side * limit


def falsify(
    model: RobotModel,
    certificate: Certificate,
    states: int = 100_000,
    seed: int = 0,
    lp_checks: int = 400,
    chunk: int = 5000,
    progress: Callable[[float], None] | None = None,
) -> FalsifierResult:
    """Search for states of S where the certified QP would be infeasible.

    Args:
        model: the robot model the certificate is for.
        certificate: the certificate under test.
        states: how many states to sample in S.
        seed: random seed.
        lp_checks: how many of the lowest-slack witness states the exact LP re-decides (all
            states whose witnesses fail are decided by the LP regardless).
        chunk: batch size of the dynamics evaluation.
        progress: optional callback with the fraction done.
    """
    certificate.check_model(model)
    rng = np.random.default_rng(seed)
    umax = np.array(model.effort_limit)
    gains = Gains(np.array(certificate.gamma), np.array(certificate.beta),
                  certificate.alpha1, certificate.alpha2, np.array(certificate.velocity_bound),
                  np.array(certificate.velocity_beta), np.array(certificate.acceleration_bound))
    delta = np.array(certificate.sampling_margin)
    parameters = certificate.disturbance_parameters
    uncertainty = certificate.uncertainty
    lo_m, hi_m = model.payload.mass_min, model.payload.mass_max
    # The filter's model carries the middle of the payload range unless it is told the
    # payload, which may then be anywhere in the range.
    told = uncertainty is None or uncertainty.payload_told_within is not None
    kept: list[tuple[np.ndarray, ...]] = []
    witness_min = np.inf
    to_decide: list[tuple[np.ndarray, ...]] = []
    done = 0
    def held(mass: np.ndarray) -> np.ndarray:
        """The mass matrix the filter's accelerations refer to (means over the hold when the
        certificate says so)."""
        if certificate.acceleration_hold_s is None:
            return mass
        return hold_mass_matrix(mass, model.viscous_friction, certificate.acceleration_hold_s)

    def planned(plant: BatchPlant, position: np.ndarray, v: np.ndarray) -> np.ndarray:
        """The matrix that maps the filter's accelerations to torque: the hold's, plus the
        lookahead's velocity term (``lookahead_position``)."""
        mass = held(plant.mass_matrix(position))
        if certificate.lookahead_s is not None:
            mass = mass + certificate.lookahead_s * plant.coriolis_jacobian(position, v)
        return mass

    def evaluated(q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Where the filter evaluates M and h (ahead along v with a lookahead)."""
        if certificate.lookahead_s is None:
            return q
        return lookahead_position(model, q, v, certificate.lookahead_s)

    while done < states:
        count = min(chunk, states - done)
        q, v = sample_safe_states(model, gains, count, rng, boundary_fraction=0.4)
        if told:
            payload = np.where(rng.random(count) < 0.3,
                               np.where(rng.random(count) < 0.5, lo_m, hi_m),
                               rng.uniform(lo_m, hi_m, count))
        else:
            payload = np.full(count, 0.5 * (lo_m + hi_m))
        plant = BatchPlant(model, payload)
        position = evaluated(q, v)
        mass = planned(plant, position, v)
        bias = plant.bias(position, v)
        estimate = _disturbance_estimates(model, plant, payload, position, v, bias, parameters,
                                          umax, rng)
        bias = bias - estimate  # what the filter's QP uses (docs/method.md, model error)
        barrier = gains.barriers(model, q, v, delta)
        lower, upper = barrier.accel_lower, barrier.accel_upper
        empty = np.any(lower > upper, axis=1)
        # Witness 1: the acceleration closest to zero; witness 2: closest to free fall.
        free_fall = np.linalg.solve(mass, -bias[..., None])[..., 0]
        best_slack = np.full(count, -np.inf)
        for target in (np.zeros_like(bias), free_fall):
            accel = np.clip(target, lower, upper)
            torque = np.einsum('nij,nj->ni', mass, accel) + bias
            slack = np.min(1.0 - np.abs(torque) / umax, axis=1)
            best_slack = np.maximum(best_slack, slack)
        best_slack[empty] = -np.inf
        witness_min = min(witness_min, float(np.min(best_slack)))
        for k in np.flatnonzero(best_slack < 0.0):
            to_decide.append((q[k], v[k], payload[k], estimate[k]))
        keep = np.argsort(best_slack)[:lp_checks]
        kept.extend((best_slack[k], q[k], v[k], payload[k], estimate[k]) for k in keep)
        done += count
        if progress is not None:
            progress(0.8 * done / states)
    kept.sort(key=lambda item: item[0])
    items = [item[1:] for item in kept[:lp_checks]] + to_decide
    results = []
    for index, (q, v, m, estimate) in enumerate(items):
        plant = BatchPlant(model, np.array([m]))
        position = evaluated(q, v)
        mass = planned(plant, position[None], v[None])[0]
        bias = plant.bias(position[None], v[None])[0] - estimate
        barrier = gains.barriers(model, q, v, delta)
        slack = _lp_slack(mass, bias, barrier.accel_lower, barrier.accel_upper, umax)
        results.append((slack, q, v, m))
        if progress is not None and index % 20 == 0:
            progress(0.8 + 0.2 * (index + 1) / max(len(items), 1))
    results.sort(key=lambda item: item[0])
    infeasible = sum(1 for slack, *_ in results if slack < 0.0)
    worst = [{'q': [round(float(x), 6) for x in q], 'v': [round(float(x), 6) for x in v],
              'payload_mass': round(float(m), 6), 'slack': float(slack)}
             for slack, q, v, m in results[:20]]
    if progress is not None:
        progress(1.0)
    return FalsifierResult(
        states=states, lp_solved=len(results), infeasible=infeasible,
        min_slack=float(results[0][0]) if results else float('inf'),
        witness_min_slack=witness_min, worst_states=worst)
