"""Bounds on the dynamics over the joint box and the payload range (docs/method.md).

Each bound is a maximum (or, for the torque-coupling margin, a minimum) over the joint box
``Q`` and the payload mass range. It is estimated in three explicit steps, all recorded:

1. quasi-random (scrambled Sobol) sampling of ``Q``, evaluated in batches;
2. local refinement: a batched pattern search (coordinate moves with a shrinking step)
   started from the worst samples of every bound that matters, which climbs to the local
   maximum near each of them;
3. an explicit inflation factor on the result.

The payload is a point mass on the tip. ``M``, ``g`` and the Christoffel symbols are affine in
its mass, so they are evaluated at zero and unit payload once and combined for any mass; the
entries of ``M^-1`` are not affine, so the mass is a search coordinate like the joints.
This is an estimate, not a proof; the falsifier (``safety_filter.certification.falsifier``) checks
the
certificate built on it independently.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass, field

import numpy as np

from safety_filter.core.dynamics import (
    christoffel_batch,
    hold_mass_matrix,
    mass_matrix_batch,
    rnea_batch,
)
from safety_filter.core.payload_affine import payload_affine_batch
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import InvalidValue

ProgressCallback = Callable[[str, float], None]


@dataclass(frozen=True)
class BoundSettings:
    """How the bounds are estimated (all recorded in the certificate).

    Attributes:
        samples: Sobol samples of the joint box (rounded up to a power of two).
        refine_starts: worst samples used as starting points per refined bound.
        refine_iterations: pattern-search iterations per start.
        inflation: factor applied to every estimated maximum (>= 1).
        relevance: bounds whose contribution is below this fraction of the largest in their
            row are not refined (they still get sampled and inflated).
        seed: seed of the scrambled Sobol sequence and the search.
        configuration_wise: keep the sampled configurations' values too, so that the
            Coriolis bound (:meth:`DynamicsBounds.coriolis_max`) and the torque rows of the
            authority condition (:meth:`DynamicsBounds.row_samples`) are taken
            configuration by configuration instead of as sums of maxima reached at
            different configurations (docs/method.md, Certification).
    """

    samples: int = 4096
    refine_starts: int = 2
    refine_iterations: int = 10
    inflation: float = 1.1
    relevance: float = 0.02
    seed: int = 0
    configuration_wise: bool = True

    def __post_init__(self) -> None:
        for what, value, least in (('samples', self.samples, 16),
                                   ('refine_starts', self.refine_starts, 0),
                                   ('refine_iterations', self.refine_iterations, 0)):
            if value < least:
                raise InvalidValue(f'bound settings: {what}', value, f'>= {least}')
        if not self.inflation >= 1.0:
            raise InvalidValue('bound settings: inflation', self.inflation, '>= 1')


@dataclass
class DynamicsBounds:
    """Estimated bounds over the joint box and payload range (inflation applied).

    Attributes:
        mass_max: ``Mbar[i, j] = max |M_ij|`` [kg m^2].
        inverse_mass_max: ``Winv[i, j] = max |(M^-1)_ij|``.
        gravity_max: ``gbar[i] = max |g_i|`` [N m].
        christoffel_max: ``Gbar[i, j, k] = max |Gamma_ijk|``.
        coupling_min: ``rho[i] = min (W_ii umax_i - sum_{j != i} |W_ij| umax_j)``
            [rad/s^2] (deflated by the inflation factor).
        payload_mass_max, payload_gravity_max, payload_christoffel_max: what one kilogram of
            payload adds to ``|M_ij|``, ``|g_i|``, ``|Gamma_ijk|`` at most (sampled, not
            refined; zero without a payload range).
        christoffel_samples, mass_samples, gravity_samples: ``|Gamma_ijk(q)|``,
            ``|M_ij(q)|`` and ``|g_i(q)|`` at each sampled configuration (and payload end),
            scaled by the inflation and by what refinement found beyond sampling, and never
            above the separate maxima (None unless ``configuration_wise``):
            :meth:`coriolis_max` and :meth:`row_samples` take the bounds configuration by
            configuration instead of adding maxima found at different ones.
        settings: how they were estimated; evaluations: configurations evaluated;
        refinement_gain: largest relative increase that refinement gave over sampling,
            per kind of bound (how much plain sampling missed).
    """

    mass_max: np.ndarray
    inverse_mass_max: np.ndarray
    gravity_max: np.ndarray
    christoffel_max: np.ndarray
    coupling_min: np.ndarray
    payload_mass_max: np.ndarray
    payload_gravity_max: np.ndarray
    payload_christoffel_max: np.ndarray
    settings: BoundSettings
    evaluations: int = 0
    refinement_gain: dict[str, float] = field(default_factory=dict)
    christoffel_samples: np.ndarray | None = None
    mass_samples: np.ndarray | None = None
    gravity_samples: np.ndarray | None = None
    # Sample rows that bound the authority LP so far (flat ``s * n + i``): the cuts a
    # search over velocity boxes starts from (authority.authority_row_sums).
    binding_rows: set[int] = field(default_factory=set, repr=False, compare=False)
    # (velocity box, settings) -> (model-error bound, authority per condition): see
    # velocity_boxes._authority_candidates.
    authority_cache: dict = field(default_factory=dict, repr=False, compare=False)

    def coriolis_max(self, velocity_box: np.ndarray) -> np.ndarray:
        """A bound of ``|(C(q, v) v)_i|`` over the joint box and ``|v_j| <= vb_j``:
        ``max_q sum_jk |Gamma_ijk(q)| vb_j vb_k`` over the sampled configurations (the sum
        bounds every ``v`` in the box at that ``q``), and never above the sum of the
        entries' separate maxima ``sum_jk Gbar_ijk vb_j vb_k``, which adds maxima reached
        at different configurations (1.6-2.8 times the configuration-wise value on bench6;
        docs/method.md)."""
        separate = np.einsum('ijk,j,k->i', self.christoffel_max, velocity_box, velocity_box)
        if self.christoffel_samples is None:
            return separate
        return np.minimum(self._coriolis_samples(velocity_box).max(axis=0), separate)

    def coriolis_jacobian_max(self, velocity_box: np.ndarray) -> np.ndarray:
        """A bound of ``|d(C(q, v) v)/dv|_ij = |2 sum_k Gamma_ijk(q) v_k|`` over the joint
        box and ``|v_k| <= vb_k``: ``2 sum_k Gbar_ijk vb_k``, shape (n, n)."""
        return 2.0 * np.einsum('ijk,k->ij', self.christoffel_max, velocity_box)

    def _coriolis_samples(self, velocity_box: np.ndarray) -> np.ndarray:
        """``sum_jk |Gamma_ijk(q_s)| vb_j vb_k`` per sample, shape (S, n)."""
        samples = self.christoffel_samples
        count, n = samples.shape[:2]
        pairs = np.multiply.outer(velocity_box, velocity_box).astype(samples.dtype)
        flat = samples.reshape(count * n, n * n) @ pairs.reshape(-1)
        return flat.reshape(count, n).astype(float)

    def row_samples(self, velocity_box: np.ndarray, viscous: np.ndarray, coulomb: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray] | None:
        """The torque rows of the authority condition at each sampled configuration:
        ``(|M(q_s)|, |g(q_s)| + sum_jk |Gamma_ijk(q_s)| vb_j vb_k + d vb + fc)``, shapes
        (S, n, n) and (S, n); ``|M(q_s)| e + bias_s <= umax`` for every sample bounds the
        torque of every ``|a_i| <= e_i`` at that configuration and every velocity in the
        box. None unless the bounds were estimated ``configuration_wise``."""
        if self.mass_samples is None or self.gravity_samples is None \
                or self.christoffel_samples is None:
            return None
        bias = (self.gravity_samples + self._coriolis_samples(velocity_box)
                + viscous * velocity_box + coulomb)
        return self.mass_samples, bias

    def bias_max(self, velocity_box: np.ndarray, viscous: np.ndarray, coulomb: np.ndarray
                 ) -> np.ndarray:
        """``hbar = gbar + Cbar(vb) + d vb + fc`` for a velocity box ``vb``
        (:meth:`coriolis_max`)."""
        return (self.gravity_max + self.coriolis_max(velocity_box) + viscous * velocity_box
                + coulomb)

    def record(self) -> dict[str, object]:
        """Settings and statistics for the certificate's provenance."""
        return {'bounds': asdict(self.settings), 'evaluations': int(self.evaluations),
                'refinement_gain': {k: round(v, 6) for k, v in self.refinement_gain.items()}}


class _Evaluator:
    """Batched evaluation of the bounded quantities at (q, payload mass) pairs."""

    def __init__(self, model: RobotModel, hold_s: float = 0.0) -> None:
        self.model = model
        self.hold_s = hold_s
        self.viscous = np.array(model.viscous_friction, dtype=float)
        self.umax = np.array(model.effort_limit)
        self.has_payload = model.payload.mass_max > 0.0
        self.count = 0

    def _affine(self, function: Callable[..., np.ndarray], q: np.ndarray, mass: np.ndarray
                ) -> np.ndarray:
        if not self.has_payload:
            return function(self.model, q, payload_mass=0.0)
        return payload_affine_batch(function, self.model, q, payload_mass=mass)

    def mass(self, q: np.ndarray, mass: np.ndarray) -> np.ndarray:
        self.count += len(q)
        mass_matrix = self._affine(mass_matrix_batch, q, mass)
        if self.hold_s > 0.0:
            return hold_mass_matrix(mass_matrix, self.viscous, self.hold_s)
        return mass_matrix

    def gravity(self, q: np.ndarray, mass: np.ndarray) -> np.ndarray:
        self.count += len(q)
        return self._affine(lambda m, x, payload_mass: rnea_batch(m, x, payload_mass=payload_mass),
                            q, mass)

    def christoffel(self, q: np.ndarray, mass: np.ndarray) -> np.ndarray:
        self.count += len(q)
        return self._affine(christoffel_batch, q, mass)

    def inverse_and_coupling(self, q: np.ndarray, mass: np.ndarray
                             ) -> tuple[np.ndarray, np.ndarray]:
        inverse = np.linalg.inv(self.mass(q, mass))
        absolute = np.abs(inverse)
        diagonal = np.einsum('...ii->...i', inverse)
        off = absolute @ self.umax - np.abs(diagonal) * self.umax
        coupling = diagonal * self.umax - off
        return inverse, coupling


def estimate_bounds(
    model: RobotModel,
    settings: BoundSettings | None = None,
    velocity_scale: np.ndarray | None = None,
    progress: ProgressCallback | None = None,
    hold_s: float = 0.0,
) -> DynamicsBounds:
    """Estimate :class:`DynamicsBounds` for ``model`` over its joint box and payload range.

    Args:
        model: the robot model (limits and payload range are taken from it).
        settings: sampling, refinement and inflation settings.
        velocity_scale: per-joint velocity used to rank which Christoffel bounds are worth
            refining (default: the velocity limits).
        progress: optional callback ``(stage, fraction_done)``.
        hold_s: when positive, ``M`` (and ``W = M^-1``) are those of the mean acceleration
            over a hold of that length (:func:`~safety_filter.core.dynamics.hold_mass_matrix`).
    """
    settings = settings or BoundSettings()
    n = model.n_joints
    lower, upper = np.array(model.position_lower), np.array(model.position_upper)
    m_lo, m_hi = model.payload.mass_min, model.payload.mass_max
    evaluator = _Evaluator(model, hold_s)
    report = progress or (lambda _stage, _fraction: None)
    vel = np.array(model.velocity_limit) if velocity_scale is None else velocity_scale

    from scipy.stats import qmc  # slow to import; only certification needs it

    # ---- 1. quasi-random sampling (joint box, plus the payload mass as a coordinate)
    dims = n + 1
    sobol = qmc.Sobol(d=dims, scramble=True, seed=settings.seed)
    points = sobol.random_base2(int(np.ceil(np.log2(settings.samples))))
    q_samples = lower + points[:, :n] * (upper - lower)
    mass_samples = m_lo + points[:, n] * (m_hi - m_lo)
    # Affine quantities peak at an end of the mass range: evaluate them at both ends.
    ends = np.array([m_lo, m_hi]) if m_hi > m_lo else np.array([m_lo])
    q_ends = np.repeat(q_samples, len(ends), axis=0)
    mass_ends = np.tile(ends, len(q_samples))
    chunk = 2048
    m_abs = np.zeros((n, n))
    g_abs = np.zeros(n)
    c_abs = np.zeros((n, n, n))
    c_samples: list[np.ndarray] = []
    m_samples: list[np.ndarray] = []
    g_samples: list[np.ndarray] = []
    w_abs = np.zeros((n, n))
    rho = np.full(n, np.inf)
    # Keep the arg-max configuration of every entry, as search starts.
    best: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}

    def keep(kind: str, values: np.ndarray, q: np.ndarray, mass: np.ndarray, sign: float = 1.0
             ) -> np.ndarray:
        flat = sign * values.reshape(len(q), -1)
        order = np.argsort(flat, axis=0)[::-1][:max(settings.refine_starts, 1)]
        top_values = np.take_along_axis(flat, order, axis=0)
        if kind in best:
            old_values, old_q, old_mass = best[kind]
            cand_values = np.concatenate([old_values, top_values])
            cand_q = np.concatenate([old_q, q[order]])
            cand_mass = np.concatenate([old_mass, mass[order]])
            pick = np.argsort(cand_values, axis=0)[::-1][:max(settings.refine_starts, 1)]
            best[kind] = (np.take_along_axis(cand_values, pick, axis=0),
                          np.take_along_axis(cand_q, pick[..., None], axis=0),
                          np.take_along_axis(cand_mass, pick, axis=0))
        else:
            best[kind] = (top_values, q[order], mass[order])
        return flat.max(axis=0) * sign

    # What one kilogram of payload adds (per kg; sampled, not refined): the difference of the
    # two ends evaluated for each configuration, which sit side by side in q_ends.
    unit_m, unit_g, unit_c = np.zeros((n, n)), np.zeros(n), np.zeros((n, n, n))
    paired = len(ends) == 2

    def unit_part(values: np.ndarray) -> np.ndarray:
        return np.max(np.abs(values[1::2] - values[0::2]), axis=0) / (m_hi - m_lo)

    total = len(q_ends)
    for start in range(0, total, chunk):
        q = q_ends[start:start + chunk]
        mass = mass_ends[start:start + chunk]
        values_m = evaluator.mass(q, mass)
        values_g = evaluator.gravity(q, mass)
        values_c = evaluator.christoffel(q, mass)
        m_abs = np.maximum(m_abs, keep('M', np.abs(values_m), q, mass).reshape(n, n))
        g_abs = np.maximum(g_abs, keep('g', np.abs(values_g), q, mass))
        c_abs = np.maximum(c_abs, keep('C', np.abs(values_c), q, mass).reshape(n, n, n))
        if settings.configuration_wise:
            c_samples.append(np.abs(values_c).reshape(len(q), n, n, n).astype(np.float32))
            m_samples.append(np.abs(values_m).reshape(len(q), n, n).astype(np.float32))
            g_samples.append(np.abs(values_g).reshape(len(q), n).astype(np.float32))
        if paired:
            unit_m = np.maximum(unit_m, unit_part(values_m))
            unit_g = np.maximum(unit_g, unit_part(values_g))
            unit_c = np.maximum(unit_c, unit_part(values_c))
        report('sampling', min(1.0, (start + chunk) / (2 * total)))
    total = len(q_samples)
    for start in range(0, total, chunk):
        q = q_samples[start:start + chunk]
        mass = mass_samples[start:start + chunk]
        inverse, coupling = evaluator.inverse_and_coupling(q, mass)
        w_abs = np.maximum(w_abs, keep('W', np.abs(inverse), q, mass).reshape(n, n))
        rho = np.minimum(rho, keep('rho', coupling, q, mass, sign=-1.0))
        report('sampling', min(1.0, 0.5 + (start + chunk) / (2 * total)))
    sampled = {'M': m_abs.copy(), 'g': g_abs.copy(), 'C': c_abs.copy(), 'W': w_abs.copy(),
               'rho': rho.copy()}

    # ---- 2. local refinement of the entries that matter
    umax = np.array(model.effort_limit)
    targets = {
        'M': _relevant(m_abs * 1.0, settings.relevance, symmetric=True),
        'W': _relevant(w_abs * umax[None, :], settings.relevance, symmetric=False),
        'g': np.arange(n),
        'C': _relevant(c_abs * vel[None, :, None] * vel[None, None, :], settings.relevance,
                       symmetric=False, triangular_last=True),
        'rho': np.arange(n),
    }
    functions: dict[str, Callable[[np.ndarray, np.ndarray], np.ndarray]] = {
        'M': lambda q, mass: np.abs(evaluator.mass(q, mass)).reshape(len(q), -1),
        'W': lambda q, mass: np.abs(np.linalg.inv(evaluator.mass(q, mass))).reshape(len(q), -1),
        'g': lambda q, mass: np.abs(evaluator.gravity(q, mass)),
        'C': lambda q, mass: np.abs(evaluator.christoffel(q, mass)).reshape(len(q), -1),
        'rho': lambda q, mass: -evaluator.inverse_and_coupling(q, mass)[1],
    }
    refined = {}
    kinds = list(targets)
    for index, kind in enumerate(kinds):
        refined[kind] = _pattern_search(
            functions[kind], targets[kind], best[kind], lower, upper, m_lo, m_hi, settings,
            affine_mass=kind in ('M', 'g', 'C'))
        report('refinement', (index + 1) / len(kinds))

    def merge(kind: str, values: np.ndarray) -> np.ndarray:
        flat = values.reshape(-1).copy()
        found = refined[kind]
        for entry, value in found.items():
            flat[entry] = max(flat[entry], value)
        return flat.reshape(values.shape)

    m_abs = merge('M', m_abs)
    m_abs = np.maximum(m_abs, m_abs.T)
    w_abs = merge('W', w_abs)
    w_abs = np.maximum(w_abs, w_abs.T)
    g_abs = merge('g', g_abs)
    c_abs = merge('C', c_abs)
    c_abs = np.maximum(c_abs, np.swapaxes(c_abs, 1, 2))
    rho = -merge('rho', -rho)

    gain = {}
    for kind, now in (('M', m_abs), ('W', w_abs), ('g', g_abs), ('C', c_abs)):
        before = sampled[kind]
        mask = before > 1e-12 * max(float(before.max()), 1e-300)
        gain[kind] = float(np.max(now[mask] / before[mask] - 1.0)) if mask.any() else 0.0
    gain['rho'] = float(np.max(np.abs(rho - sampled['rho']) /
                               np.maximum(np.abs(sampled['rho']), 1e-12)))

    # ---- 3. inflation
    k = settings.inflation

    def per_sample(parts: list[np.ndarray], kind: str, separate: np.ndarray
                   ) -> np.ndarray | None:
        # Refinement raised some entry beyond what sampling saw by gain[kind]: every sample
        # takes that factor too, capped by the entry's separate maximum.
        if not parts:
            return None
        scaled = np.concatenate(parts) * np.float32(k * (1.0 + max(gain[kind], 0.0)))
        return np.minimum(scaled, (k * separate).astype(np.float32))

    return DynamicsBounds(
        mass_max=k * m_abs,
        inverse_mass_max=k * w_abs,
        gravity_max=k * g_abs,
        christoffel_max=k * c_abs,
        coupling_min=rho - (k - 1.0) * np.abs(rho),
        payload_mass_max=k * unit_m,
        payload_gravity_max=k * unit_g,
        payload_christoffel_max=k * unit_c,
        settings=settings,
        evaluations=evaluator.count,
        refinement_gain=gain,
        christoffel_samples=per_sample(c_samples, 'C', c_abs),
        mass_samples=(None if not m_samples else  # float64: the LP's rows, every call
                      per_sample(m_samples, 'M', m_abs).astype(float)),
        gravity_samples=per_sample(g_samples, 'g', g_abs),
    )


def _relevant(contribution: np.ndarray, relevance: float, symmetric: bool,
              triangular_last: bool = False) -> np.ndarray:
    """Flat indices of entries worth refining: large compared with their row's largest."""
    n = contribution.shape[0]
    rows = contribution.reshape(n, -1)
    keep = rows >= relevance * np.maximum(rows.max(axis=1, keepdims=True), 1e-300)
    keep &= rows > 0.0
    mask = keep.reshape(contribution.shape)
    if symmetric:
        mask = np.triu(mask)
    if triangular_last:
        j, k = np.indices(contribution.shape[1:])
        mask = mask & (j <= k)[None]
    return np.flatnonzero(mask)


def _pattern_search(
    function: Callable[[np.ndarray, np.ndarray], np.ndarray],
    entries: np.ndarray,
    starts: tuple[np.ndarray, np.ndarray, np.ndarray],
    lower: np.ndarray,
    upper: np.ndarray,
    m_lo: float,
    m_hi: float,
    settings: BoundSettings,
    affine_mass: bool,
) -> dict[int, float]:
    """Maximise ``function(q, mass)[:, entry]`` locally from the best samples, all at once.

    Coordinate moves of +-step in every joint (and the payload mass when the quantity is not
    affine in it), keeping improvements, halving the step when none is found. All entries and
    starts are evaluated in one batch per iteration.
    """
    if len(entries) == 0 or settings.refine_starts == 0 or settings.refine_iterations == 0:
        return {}
    _, start_q, start_mass = starts
    n = len(lower)
    span = upper - lower
    use_mass = (not affine_mass) and m_hi > m_lo
    q = start_q[:settings.refine_starts][:, entries].transpose(1, 0, 2).reshape(-1, n)
    mass = start_mass[:settings.refine_starts][:, entries].T.reshape(-1)
    entry_of = np.repeat(entries, min(settings.refine_starts, len(start_q)))
    value = function(q, mass)[np.arange(len(q)), entry_of]
    step = np.full(len(q), 0.1)
    moves = [(k, s) for k in range(n) for s in (1.0, -1.0)]
    if use_mass:
        moves += [(n, 1.0), (n, -1.0)]
    for _ in range(settings.refine_iterations):
        cand_q = np.repeat(q[None], len(moves), axis=0)
        cand_mass = np.repeat(mass[None], len(moves), axis=0)
        for index, (k, sign) in enumerate(moves):
            if k < n:
                cand_q[index, :, k] += sign * step * span[k]
            else:
                cand_mass[index] += sign * step * (m_hi - m_lo)
        cand_q = np.clip(cand_q, lower, upper)
        cand_mass = np.clip(cand_mass, m_lo, m_hi)
        flat_q = cand_q.reshape(-1, n)
        flat_mass = cand_mass.reshape(-1)
        cand_value = function(flat_q, flat_mass)[
            np.arange(len(flat_q)), np.tile(entry_of, len(moves))].reshape(len(moves), -1)
        pick = np.argmax(cand_value, axis=0)
        better = cand_value[pick, np.arange(len(q))] > value
        q[better] = cand_q[pick[better], np.flatnonzero(better)]
        mass[better] = cand_mass[pick[better], np.flatnonzero(better)]
        value[better] = cand_value[pick[better], np.flatnonzero(better)]
        step = np.where(better, step, 0.5 * step)
    result: dict[int, float] = {}
    for entry, found in zip(entry_of, value):
        result[int(entry)] = max(result.get(int(entry), -np.inf), float(found))
    return result
