"""Hand-built certificates and state samplers for the filter tests and the benchmark.

The certification code builds certificates for real use; these are made here, independently
and crudely, so the filter can be tested on its own. The recipe follows METHOD 4.1-4.3 with
plain sampling and generous margins:

* bounds over the joint box and both ends of the payload range from 1000 quasi-random
  (Halton, scipy.stats.qmc) samples, each inflated by 1.2;
* the velocity box is the first of 0.5, 0.35, 0.25, 0.15 times the rated velocity limits
  for which the LP below has a solution (METHOD 5.1: rated limits are rarely certifiable);
* acceleration authority from the LP ``max t  s.t.  Mbar e + hbar <= umax, e >= t c``
  (METHOD 4.2; solved with SciPy's HiGHS), then halved;
* linear alpha1 and alpha2, ``gamma = min(0.7 gamma*, velocity_bound / range)`` with
  ``gamma* = sqrt((e - mu) / range)`` (METHOD 4.3), ``beta* = 0``; ``beta`` at 1.2 times the
  floor (acceleration bound at rest mid-range equal to the usable authority), capped at
  ``0.5 / T``;
* sampling margin ``mu = 0.02 e``.
"""

from __future__ import annotations

import functools
from dataclasses import replace

import numpy as np
from scipy.optimize import linprog
from scipy.stats import qmc

from safety_filter.core.certificate import Certificate
from safety_filter.core.class_k import ClassK
from safety_filter.core.dynamics import christoffel_batch, gravity_torque_batch, mass_matrix_batch
from safety_filter.core.robot_model import RobotModel
from safety_filter.simulation.demo_arms import load_demo_arm

CONTROL_RATE_HZ = 1000.0
VELOCITY_SCALES = (0.5, 0.35, 0.25, 0.15)  # tried in turn until the LP has a solution
INFLATION = 1.2


def sampled_bounds(model: RobotModel, velocity_bound: np.ndarray, samples: int = 1000
                   ) -> tuple[np.ndarray, np.ndarray]:
    """``(Mbar, hbar)`` over the joint box, the velocity box and the payload range ends."""
    n = model.n_joints
    unit = qmc.Halton(d=n, seed=7).random(samples)
    q = model.position_lower + unit * model.position_range
    mbar = np.zeros((n, n))
    gbar = np.zeros(n)
    christoffel = np.zeros((n, n, n))
    for mass in (model.payload.mass_min, model.payload.mass_max):
        mbar = np.maximum(mbar, np.abs(mass_matrix_batch(model, q, payload_mass=mass)).max(0))
        gbar = np.maximum(gbar, np.abs(gravity_torque_batch(model, q, payload_mass=mass)).max(0))
        christoffel = np.maximum(
            christoffel, np.abs(christoffel_batch(model, q, payload_mass=mass)).max(0))
    mbar *= INFLATION
    coriolis = np.einsum('ijk,j,k->i', christoffel, velocity_bound, velocity_bound)
    hbar = INFLATION * (gbar + coriolis) + np.array(model.viscous_friction) * velocity_bound \
        + np.array(model.coulomb_friction)
    return mbar, hbar


def authority_lp(mbar: np.ndarray, hbar: np.ndarray, umax: np.ndarray) -> np.ndarray:
    """Largest ``t`` with ``e >= t c`` and ``Mbar e + hbar <= umax`` (HiGHS LP).

    ``c_i = (umax_i - hbar_i) / Mbar_ii`` is each joint's authority if it were alone, so the
    LP maximises a weighted minimum (METHOD 4.2).
    """
    n = len(umax)
    spare = umax - hbar
    if np.any(spare <= 0):
        raise RuntimeError('no acceleration authority: umax <= hbar')
    weight = spare / np.diag(mbar)
    # variables [e (n), t]; maximise t
    cost = np.zeros(n + 1)
    cost[-1] = -1.0
    a_ub = np.vstack([np.hstack([mbar, np.zeros((n, 1))]),
                      np.hstack([-np.eye(n), weight[:, None]])])
    b_ub = np.concatenate([umax - hbar, np.zeros(n)])
    result = linprog(cost, A_ub=a_ub, b_ub=b_ub, bounds=[(0, None)] * (n + 1), method='highs')
    if result.status != 0 or result.x[-1] <= 0:
        raise RuntimeError(f'no acceleration authority: {result.message}')
    return result.x[:n]


def build_certificate(model: RobotModel, alpha1: ClassK | None = None) -> Certificate:
    """A certificate for ``model`` made by the crude recipe of this module."""
    alpha1 = alpha1 or ClassK('linear')
    alpha2 = ClassK('linear')
    vmax = np.array(model.velocity_limit)
    umax = np.array(model.effort_limit)
    for scale in VELOCITY_SCALES:
        velocity_bound = scale * vmax
        mbar, hbar = sampled_bounds(model, velocity_bound)
        try:
            authority = 0.5 * authority_lp(mbar, hbar, umax)
            break
        except RuntimeError:
            continue
    else:
        raise RuntimeError(f'{model.name}: no certifiable velocity box in {VELOCITY_SCALES}')
    margin = 0.02 * authority
    usable = authority - margin
    rng = np.array(model.position_range)
    slope = np.array([alpha1.max_value_times_slope(r) for r in rng])
    gamma_star = np.sqrt(usable / slope)
    alpha_r = np.array([float(alpha1.value(r)) for r in rng])
    gamma = np.minimum(0.7 * gamma_star, velocity_bound / alpha_r)
    period = 1.0 / CONTROL_RATE_HZ
    half = np.array([float(alpha1.value(r / 2.0)) for r in rng])
    beta_floor = usable / (gamma * half)
    beta_cap = np.full(len(rng), 0.5 / period)
    beta = np.minimum(1.2 * beta_floor, beta_cap)
    return Certificate(
        joint_names=list(model.joint_names),
        position_lower=model.position_lower, position_upper=model.position_upper,
        velocity_limit=vmax, effort_limit=umax, velocity_bound=velocity_bound,
        gamma=gamma, gamma_star=gamma_star, beta=beta, beta_star=np.zeros(len(rng)),
        beta_floor=beta_floor, beta_cap=beta_cap, authority=authority,
        sampling_margin=margin, viscous_friction=model.viscous_friction,
        coulomb_friction=model.coulomb_friction, condition='acceleration_authority',
        alpha1=alpha1, alpha2=alpha2, control_rate_hz=CONTROL_RATE_HZ, sampling_factor=1.0,
        payload_mass_range=(model.payload.mass_min, model.payload.mass_max),
        payload_point=tuple(float(x) for x in model.payload.point),
        model_hash=model.content_hash(), package_version='test', created='test',
        settings={'recipe': 'test/filter_fixtures.py',
                  # a range for the disturbance observer's estimate (docs/method.md): 5 % of
                  # the torque box, 10 % link error, the payload not told
                  'disturbance_constant': [float(x) for x in 0.05 * umax],
                  'disturbance_link_error': 0.1,
                  'disturbance_payload_error': 0.5 * (model.payload.mass_max
                                                      - model.payload.mass_min)},
        certified=True)


@functools.lru_cache(maxsize=None)
def demo_arm_and_certificate(name: str, alpha1_kind: str = 'linear'
                             ) -> tuple[RobotModel, Certificate]:
    """A demo arm with a hand-built certificate (cached for the session)."""
    model = load_demo_arm(name)
    alpha1 = ClassK(alpha1_kind, 1.0)
    return model, build_certificate(model, alpha1)


def uncertified(certificate: Certificate) -> Certificate:
    """A copy marked as not certified."""
    return replace(certificate, certified=False, reasons=['test: marked uncertified'])


def velocity_interval(certificate: Certificate, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The velocities ``v`` of S's slice at positions ``q`` (``bp, bn >= 0``, and inside the
    velocity box when the certificate keeps it by barriers)."""
    return certificate.safe_velocity_interval(q)


def random_state_in_safe_set(rng: np.random.Generator, certificate: Certificate,
                             edge_fraction: float = 0.3) -> tuple[np.ndarray, np.ndarray]:
    """A state in S; with probability ``edge_fraction`` per joint on or near its boundary."""
    lower, upper = certificate.position_lower, certificate.position_upper
    q = rng.uniform(lower, upper)
    low, high = velocity_interval(certificate, q)
    v = rng.uniform(low, high)
    near = rng.random(len(q)) < edge_fraction
    side = rng.random(len(q)) < 0.5
    shrink = 1.0 - 1e-9
    v = np.where(near & side, high * shrink, np.where(near & ~side, low * shrink, v))
    return q, v


def random_nominal(rng: np.random.Generator, certificate: Certificate) -> np.ndarray:
    """A nominal torque: inside the box, a few times outside, or far outside (x1000)."""
    umax = certificate.effort_limit
    kind = rng.integers(3)
    scale = (1.0, 5.0, 1000.0)[kind]
    return scale * rng.uniform(-umax, umax)
