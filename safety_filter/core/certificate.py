"""The certificate: certified gains and everything needed to trust them, as a parameter file.

A :class:`Certificate` is what :func:`safety_filter.certification.certify` produces and what the
filter
loads. On disk it is a ROS 2 parameter file (the YAML that ``--params-file`` takes), keyed
``/**`` (:data:`PARAMETER_FILE_KEY`): ROS applies that key to the node it is given to,
whatever the node's name and namespace, so the same file serves ``/safety_filter``,
``/arm1/safety_filter`` or a renamed node without editing. Give it only to the filter node
(``parameters=[certificate]`` of its ``Node`` in a launch file, ``--params-file`` of its
process): every parameter it holds is a read-only safety parameter of that node. The key is
not part of the content: the certificate id and the model hash are checked whatever it is,
and files keyed by the node name (earlier releases) still load.

The certificate is tied to one robot model by :meth:`RobotModel.content_hash`; loading it
for a model with another hash raises :class:`CertificateMismatch`, which names the likely
cause from the model details the certificate records (joints, limits, friction, payload,
declared uncertainty).

Kept in one module: the fields, their checks and the parameter file's round trip change
together (a new field touches all three).
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from safety_filter.core.class_k import ALPHA1_KINDS, ALPHA2_KINDS, ClassK
from safety_filter.core.robot_model import RobotModel
from safety_filter.core.uncertainty_set import UncertaintySet
from safety_filter.core.yaml_files import read_yaml_file
from safety_filter.errors import CertificateError, CertificateMismatch

# The parameter-file key of a certificate: every node in every namespace, i.e. the node the
# file is given to (see the module docstring).
PARAMETER_FILE_KEY = '/**'
CERTIFICATE_FORMAT = 'safety_filter/certificate-1'
CONDITIONS = ('acceleration_authority', 'torque_coupling')
DEFAULT_OBSERVER_PERIODS = 20.0  # the observer's slowest time constant [control periods]

_VECTOR_FIELDS = (
    'position_lower', 'position_upper', 'velocity_limit', 'effort_limit', 'velocity_bound',
    'gamma', 'gamma_star', 'beta', 'beta_star', 'beta_floor', 'beta_cap', 'authority',
    'sampling_margin', 'viscous_friction', 'coulomb_friction')


@dataclass(frozen=True)
class Certificate:
    """Certified per-joint gains with their provenance. Vectors are in joint order.

    Immutable, since :attr:`certificate_id` hashes the content: the vectors are read-only
    copies, and the lists and mappings are the certificate's own copies (not to be changed
    in place). A changed certificate is a new one: ``dataclasses.replace(certificate,
    certified=False, reasons=[...])``.

    Attributes (units: rad, rad/s, rad/s^2, N m; m, m/s, m/s^2, N for prismatic joints):
        joint_names: the chain's joints, base to tip.
        position_lower, position_upper, velocity_limit, effort_limit: the model's limits.
        velocity_bound: certified velocity box vS, inside ``velocity_limit``. With
            ``velocity_beta`` the filter keeps it by velocity barriers of its own; without
            (older certificates) the velocity lemma bound ``gamma * alpha1(range)`` is inside
            it.
        gamma, beta: the gains the filter uses; gamma_star, beta_star the certified bounds
            (``gamma <= gamma_star``, ``beta >= beta_star``); beta_floor, beta_cap the
            practical range for beta (docs/method.md).
        authority: acceleration authority ``e`` per joint (docs/method.md), before the
            sampling margin; sampling_margin: acceleration reserved for one hold period.
        condition: which sufficient condition certified the gains.
        alpha1, alpha2: the class-K families.
        control_rate_hz: the control rate the sampling margin was derived for.
        sampling_factor: the margin covers hold periods up to this many control periods.
        payload_mass_range, payload_point: payload range covered [kg], point on tip [m].
        model_hash: content hash of the model; package_version, created: provenance.
        settings: sampling and refinement settings of the bounds; falsifier: its summary.
        certified: whether every check passed; reasons: per-joint findings when not.
        velocity_beta: rate of the velocity barriers ``vS -+ v >= 0`` [1/s] per joint (0:
            none; ``docs/method.md``).
        acceleration_bound: the filter keeps ``|a|`` within it [rad/s^2] (inf: no bound).
        acceleration_hold_s: when set, the accelerations the filter bounds are means over a
            hold of this length [s] (``u = M_hold a + h``,
            ``dynamics.hold_mass_matrix``): the exact response of the damped joints.
        prediction_s: when set, the declared delay between measurement and torque [s]: the
            filter plans each torque for the state it predicts at the end of it (from the
            torques already sent), and the sampling margin covers one hold from there.
            Unset (older certificates, or a delay declared as an upper bound): the filter
            plans at the measured state and the margin covers the delay as a longer hold.
        lookahead_s: when set, the filter plans each torque for the state this long after
            the planned one, the middle of the hold the margin covers: ``M`` and ``h`` at the
            position reached at the current velocity (within the position limits), plus the
            velocity's share to first order (``lookahead_position``). The drift of the
            dynamics along the motion within the hold is then planned for, not reserved
            (docs/method.md, "Lookahead"). Unset (older certificates): at the state itself.
        slow_design: when set, a second certified design for the same model with a smaller
            velocity box and more braking authority (a certificate of its own, without a
            slow design). The filter's safe set is then the union of the two: at each step
            it keeps the state in a design's set that contains it, whichever changes the
            nominal least (docs/method.md, "The slow set").
    """

    joint_names: list[str]
    position_lower: np.ndarray
    position_upper: np.ndarray
    velocity_limit: np.ndarray
    effort_limit: np.ndarray
    velocity_bound: np.ndarray
    gamma: np.ndarray
    gamma_star: np.ndarray
    beta: np.ndarray
    beta_star: np.ndarray
    beta_floor: np.ndarray
    beta_cap: np.ndarray
    authority: np.ndarray
    sampling_margin: np.ndarray
    viscous_friction: np.ndarray
    coulomb_friction: np.ndarray
    condition: str
    alpha1: ClassK
    alpha2: ClassK
    control_rate_hz: float
    sampling_factor: float
    payload_mass_range: tuple[float, float]
    payload_point: tuple[float, float, float]
    model_hash: str
    package_version: str
    created: str
    settings: dict[str, Any] = field(default_factory=dict)
    falsifier: dict[str, Any] = field(default_factory=dict)
    certified: bool = True
    reasons: list[str] = field(default_factory=list)
    velocity_beta: np.ndarray | None = None
    acceleration_bound: np.ndarray | None = None
    acceleration_hold_s: float | None = None
    prediction_s: float | None = None
    lookahead_s: float | None = None
    slow_design: Certificate | None = None

    def __post_init__(self) -> None:
        # The one place that sets fields: the constructor's checks and read-only copies.
        def store(name: str, value: Any) -> None:
            object.__setattr__(self, name, value)

        store('joint_names', [str(name) for name in self.joint_names])
        store('settings', dict(self.settings))
        store('falsifier', dict(self.falsifier))
        store('reasons', list(self.reasons))
        n = len(self.joint_names)
        bound = np.full(n, np.inf) if self.acceleration_bound is None else np.array(
            self.acceleration_bound, dtype=float).reshape(-1)
        if bound.shape != (n,) or np.any(np.isnan(bound)) or np.any(bound <= 0.0):
            raise CertificateError(f'acceleration_bound must have {n} positive entries')
        bound.flags.writeable = False
        store('acceleration_bound', bound)
        for name in ('acceleration_hold_s', 'prediction_s', 'lookahead_s'):  # optional times
            if getattr(self, name) is not None:
                seconds = float(getattr(self, name))
                if not (math.isfinite(seconds) and seconds > 0.0):
                    raise CertificateError(f'{name} must be positive, got {seconds}')
                store(name, seconds)
        speed_beta = np.zeros(n) if self.velocity_beta is None else np.array(
            self.velocity_beta, dtype=float).reshape(-1)
        if speed_beta.shape != (n,) or not np.all(np.isfinite(speed_beta)) \
                or np.any(speed_beta < 0.0):
            raise CertificateError(f'velocity_beta must have {n} finite non-negative entries')
        speed_beta.flags.writeable = False
        store('velocity_beta', speed_beta)
        for name in _VECTOR_FIELDS:
            array = np.array(getattr(self, name), dtype=float).reshape(-1)
            if array.shape != (n,):
                raise CertificateError(f'{name} must have {n} entries, got {array.shape[0]}')
            array.flags.writeable = False
            store(name, array)
        if self.condition not in CONDITIONS:
            raise CertificateError(f'unknown condition {self.condition!r}; expected {CONDITIONS}')
        if isinstance(self.alpha1, dict):
            store('alpha1', ClassK(**self.alpha1))
        if isinstance(self.alpha2, dict):
            store('alpha2', ClassK(**self.alpha2))
        store('payload_mass_range', tuple(float(x) for x in self.payload_mass_range))
        store('payload_point', tuple(float(x) for x in self.payload_point))
        if self.alpha1.kind not in ALPHA1_KINDS:
            raise CertificateError(f'alpha1 must be one of {ALPHA1_KINDS}')
        if self.alpha2.kind not in ALPHA2_KINDS:
            raise CertificateError(f'alpha2 must be one of {ALPHA2_KINDS}')
        if not (math.isfinite(self.control_rate_hz) and self.control_rate_hz > 0):
            raise CertificateError(f'control_rate_hz must be positive, got {self.control_rate_hz}')
        if self.slow_design is not None:
            self._check_slow_design(self.slow_design)
        if self.certified:
            bad = [self.joint_names[i] for i in range(n)
                   if not (self.gamma[i] > 0 and self.beta[i] > 0 and self.authority[i] > 0
                           and np.isfinite(self.gamma[i]) and np.isfinite(self.beta[i]))]
            if bad:
                raise CertificateError(f'a certified certificate needs positive finite gains '
                                       f'and authority; not so for joints {bad}')

    def _check_slow_design(self, slow: Certificate) -> None:
        """The slow design must be a plain certified design for the same model, limits and
        timing (the filter evaluates both with one model and one step)."""
        if not isinstance(slow, Certificate):
            raise CertificateError('slow_design must be a certificate')
        if slow.slow_design is not None:
            raise CertificateError('a slow design cannot have a slow design of its own')
        if not slow.certified:
            raise CertificateError('the slow design is not certified')
        same = (slow.joint_names == self.joint_names and slow.model_hash == self.model_hash
                and slow.alpha1.kind == self.alpha1.kind and slow.alpha2 == self.alpha2
                and slow.control_rate_hz == self.control_rate_hz
                and slow.acceleration_hold_s == self.acceleration_hold_s
                and slow.prediction_s == self.prediction_s
                and slow.lookahead_s == self.lookahead_s
                and all(np.array_equal(getattr(slow, name), getattr(self, name))
                        for name in ('position_lower', 'position_upper', 'velocity_limit',
                                     'effort_limit')))
        if not same:
            raise CertificateError('the slow design belongs to another model, limits, '
                                   'class-K family or timing than its certificate')
        if self.prediction_s is not None:
            raise CertificateError('a slow design needs the delay as an upper bound (the '
                                   'filter does not predict over it with two designs)')

    # ------------------------------------------------------------------ identity
    @property
    def n_joints(self) -> int:
        """Number of joints."""
        return len(self.joint_names)

    @property
    def control_period_s(self) -> float:
        """Control period [s]."""
        return 1.0 / self.control_rate_hz

    @property
    def observer_time_constants_s(self) -> np.ndarray:
        """Time constants of the filter's disturbance observer per joint [s]
        (``docs/method.md``). Certificates from before they were chosen per joint give their
        one value to every joint; older ones twenty control periods."""
        values = self.settings.get('observer_time_constants_s')
        if values is None:
            single = self.settings.get('observer_time_constant_s')
            values = (DEFAULT_OBSERVER_PERIODS / self.control_rate_hz if single is None
                      else float(single))
        return np.broadcast_to(np.asarray(values, dtype=float), (self.n_joints,)).copy()

    @property
    def disturbance_parameters(self) -> tuple[np.ndarray, float, float] | None:
        """``(constant [N m], link_error, payload_error [kg])`` of the bound that the filter
        keeps its disturbance estimate in (``uncertainty.state_disturbance_bound``); None for
        certificates made before it existed."""
        constant = self.settings.get('disturbance_constant')
        if constant is None:
            return None
        return (np.array(constant, dtype=float),
                float(self.settings.get('disturbance_link_error', 0.0)),
                float(self.settings.get('disturbance_payload_error', 0.0)))

    @property
    def uncertainty(self) -> UncertaintySet | None:
        """The declared uncertainty set the certificate was made for (None if unrecorded)."""
        record = self.settings.get('uncertainty')
        return None if record is None else UncertaintySet.from_mapping(record)

    @property
    def certificate_id(self) -> str:
        """Short id of the certificate content (first 12 hex digits of its SHA-256)."""
        text = json.dumps(self._plain(), sort_keys=True, separators=(',', ':'))
        return hashlib.sha256(text.encode()).hexdigest()[:12]

    def check_model(self, model: RobotModel) -> None:
        """Raise :class:`CertificateMismatch` unless the certificate belongs to ``model``.

        The error names the likely cause (:meth:`mismatch_cause`).
        """
        found = model.content_hash()
        if found != self.model_hash:
            raise CertificateMismatch(self.model_hash, found, self.mismatch_cause(model))

    def mismatch_cause(self, model: RobotModel) -> str:
        """What differs between ``model`` and the model this certificate was made for, and
        the likely remedy, judged from the details the certificate records.

        The checks go from the most to the least likely slip: another chain (the limits
        file selects it, so a missing or different limits file shows here first), then the
        limits, friction, payload and declared uncertainty (all from the limits file), and
        only when every recorded detail agrees, the URDF's kinematics or inertials (or
        gravity), which the certificate records only through its hash.
        """
        no_limits = getattr(model, 'limits_source', '') is None
        limits_hint = ('no limits file was given: give the one the certificate was made '
                       'with (--limits / limits_path)' if no_limits
                       else 'give the limits file the certificate was made with')
        names, recorded = list(model.joint_names), list(self.joint_names)
        if names != recorded:
            if set(names) == set(recorded):
                what = f'the same joints in another order ({names} vs {recorded})'
            else:
                extra = [j for j in names if j not in recorded]
                missing = [j for j in recorded if j not in names]
                what = (f'another chain: the model has joints {names}, the certificate '
                        f'{recorded}' + (f'; not certified: {extra}' if extra else '')
                        + (f'; missing: {missing}' if missing else ''))
            return (f'{what}. The chain comes from the limits file (chain: base_link, '
                    f'tip_link or joints); {limits_hint}, or certify this chain')
        differences = []
        for label, ours, theirs in (
                ('position limits', np.stack([model.position_lower, model.position_upper], 1),
                 np.stack([self.position_lower, self.position_upper], 1)),
                ('velocity limits', model.velocity_limit, self.velocity_limit),
                ('effort limits', model.effort_limit, self.effort_limit),
                ('viscous friction', model.viscous_friction, self.viscous_friction),
                ('Coulomb friction', model.coulomb_friction, self.coulomb_friction)):
            ours, theirs = np.asarray(ours, dtype=float), np.asarray(theirs, dtype=float)
            changed = [i for i in range(len(names))
                       if not np.allclose(ours[i], theirs[i], rtol=1e-9, atol=1e-12)]
            if changed:
                i = changed[0]
                differences.append(
                    f'{label} of {len(changed)} joint(s), e.g. {names[i]}: '
                    f'{_show(ours[i])} in the model, {_show(theirs[i])} certified')
        payload = (model.payload.mass_min, model.payload.mass_max)
        if not np.allclose(payload, self.payload_mass_range, rtol=1e-9, atol=1e-12) or \
                not np.allclose(model.payload.point, self.payload_point, rtol=1e-9,
                                atol=1e-12):
            differences.append(
                f'payload: {list(payload)} kg at {list(model.payload.point)} m in the model, '
                f'{list(self.payload_mass_range)} kg at {list(self.payload_point)} m '
                'certified')
        recorded_uncertainty = self.settings.get('uncertainty')
        if recorded_uncertainty is not None and \
                _rounded_record(model.uncertainty.record()) != \
                _rounded_record(recorded_uncertainty):
            differences.append('the declared uncertainty (the uncertainty section)')
        if differences and no_limits:
            return ('no limits file was given, and the values of the URDF differ from the '
                    f'certified ones: {"; ".join(differences)}. Give the limits file the '
                    'certificate was made with (--limits / limits_path)')
        if differences:
            return (f'the limits file differs: {"; ".join(differences)}. Give the limits file '
                    'the certificate was made with, or certify again for these limits')
        return ('the URDF differs (kinematics, masses, inertias or gravity): the joints, '
                'limits, friction, payload and uncertainty agree with the certificate. Use '
                'the URDF the certificate was made with, or certify this one again')

    # ------------------------------------------------------------------ files
    def safe_velocity_interval(self, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The velocities of the safe set S at positions ``q``: ``(low, high)`` per joint."""
        from safety_filter.core.barriers import safe_velocity_interval

        return safe_velocity_interval(np.asarray(q, dtype=float), self.position_lower,
                                      self.position_upper, self.gamma, self.alpha1,
                                      self.velocity_bound, self.velocity_beta)

    def safe_set_margins(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Per joint, the smallest barrier value at ``(q, v)`` (position, velocity and, where
        the certificate has them, velocity-box barriers), batched over leading axes; the
        state is in S where every joint's is >= 0. With a slow design S is the union of the
        two designs' sets: each state gets the values of the design whose smallest value
        over the joints is larger (the design whose set contains it, when one does)."""
        from safety_filter.core.barriers import evaluate_barriers

        q = np.asarray(q, dtype=float)
        v = np.asarray(v, dtype=float)
        margins = []
        for design in (self, self.slow_design):
            if design is None:
                continue
            margins.append(evaluate_barriers(
                q, v, design.position_lower, design.position_upper, design.gamma,
                design.beta, design.alpha1, design.alpha2, 0.0, design.velocity_bound,
                design.velocity_beta).smallest)
        if len(margins) == 1:
            return margins[0]
        slow_nearer = margins[1].min(axis=-1) > margins[0].min(axis=-1)
        return np.where(slow_nearer[..., None], margins[1], margins[0])

    def slice_areas(self, samples: int = 4001) -> np.ndarray:
        """Per joint, the area of S in the joint's (q, v) plane; with a slow design, of the
        union of the two designs' slices (at each position the union of the two velocity
        intervals, both of which contain zero inside the limits)."""
        lower, upper = np.asarray(self.position_lower), np.asarray(self.position_upper)
        q = lower + np.linspace(0.0, 1.0, samples)[:, None] * (upper - lower)
        low, high = self.safe_velocity_interval(q)
        if self.slow_design is not None:
            slow_low, slow_high = self.slow_design.safe_velocity_interval(q)
            low, high = np.minimum(low, slow_low), np.maximum(high, slow_high)
        return np.array([float(np.trapezoid(high[:, i] - low[:, i], q[:, i]))
                         for i in range(self.n_joints)])

    def recovery_time(self, q: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Per joint, the time [s] within which the filter brings a joint outside S back into
        S from ``(q, v)``, whether the QP meets the bounds or the push-back acts
        (``barriers.recovery_time_bound``, docs/method.md): 0 in S, inf past a position
        limit or where the joint might not stop before it. It holds while the speeds stay
        within ``velocity_bound`` (where the authority is certified), the drift over a hold
        is what the sampling margin was sized for, and the filter's model, with its
        disturbance estimate, is right."""
        from safety_filter.core.barriers import recovery_time_bound

        return recovery_time_bound(np.asarray(q, dtype=float), np.asarray(v, dtype=float),
                                   self.position_lower, self.position_upper, self.gamma,
                                   self.beta, self.alpha1, self.alpha2, self.usable_authority,
                                   self.sampling_margin, self.velocity_bound,
                                   self.velocity_beta, self._drift_share)

    def worst_recovery_time(self) -> np.ndarray:
        """Per joint, the longest :meth:`recovery_time` from any state within the position
        limits at speeds up to ``velocity_bound`` [s]."""
        from safety_filter.core.barriers import worst_recovery_time

        return worst_recovery_time(self.velocity_bound,
                                   self.position_upper - self.position_lower, self.gamma,
                                   self.beta, self.alpha1, self.alpha2, self.usable_authority,
                                   self.sampling_margin, self.velocity_bound,
                                   self.velocity_beta, self._drift_share)

    @property
    def _drift_share(self) -> float:
        """The share of the sampling margin the drift over a hold may take: the margin is the
        largest sampled drift times the certification's inflation (1.5 by default)."""
        inflation = float(self.settings.get('certify', {}).get('margin_inflation', 1.5))
        return 1.0 / max(inflation, 1.0)

    @property
    def usable_authority(self) -> np.ndarray:
        """``e = authority - sampling_margin`` [rad/s^2]: what the filter may ask of a joint."""
        return self.authority - self.sampling_margin

    @property
    def has_acceleration_bound(self) -> bool:
        """Whether the filter bounds the joint accelerations."""
        return bool(np.all(np.isfinite(self.acceleration_bound)))

    @property
    def has_velocity_barriers(self) -> bool:
        """Whether the filter keeps the velocity box by barriers of its own."""
        return bool(np.any(self.velocity_beta > 0.0))

    def _plain(self) -> dict[str, Any]:
        plain: dict[str, Any] = {}
        for item in fields(self):
            if item.name == 'velocity_beta' and not self.has_velocity_barriers:
                continue  # certificates without velocity barriers keep their ids
            if item.name == 'acceleration_bound' and not self.has_acceleration_bound:
                continue
            if item.name == 'acceleration_hold_s' and self.acceleration_hold_s is None:
                continue
            if item.name == 'prediction_s' and self.prediction_s is None:
                continue
            if item.name == 'lookahead_s' and self.lookahead_s is None:
                continue
            if item.name == 'slow_design':
                if self.slow_design is not None:  # the id covers the slow design too
                    plain[item.name] = self.slow_design.to_parameters()
                continue
            value = getattr(self, item.name)
            if isinstance(value, np.ndarray):
                value = [float(x) for x in value]
            elif isinstance(value, ClassK):
                value = value.to_dict()
            elif isinstance(value, tuple):
                value = [float(x) for x in value]
            plain[item.name] = value
        return plain

    def to_parameters(self) -> dict[str, Any]:
        """The parameter dictionary (flat names, ROS 2 parameter types only)."""
        plain = self._plain()
        params: dict[str, Any] = {'certificate_format': CERTIFICATE_FORMAT}
        for name in ('joint_names', *_VECTOR_FIELDS, 'condition', 'control_rate_hz',
                     'sampling_factor', 'model_hash', 'package_version', 'created',
                     'certified'):
            params[name] = plain[name]
        params['alpha1_kind'] = self.alpha1.kind
        params['alpha1_scale'] = float(self.alpha1.scale)
        params['alpha2_kind'] = self.alpha2.kind
        params['alpha2_scale'] = float(self.alpha2.scale)
        params['payload_mass_range'] = plain['payload_mass_range']
        params['payload_point'] = plain['payload_point']
        # Nested provenance stays a JSON string: ROS parameters have no maps of lists.
        params['settings_json'] = json.dumps(self.settings, sort_keys=True)
        params['falsifier_json'] = json.dumps(self.falsifier, sort_keys=True)
        params['reasons'] = list(self.reasons) or ['']
        if self.has_velocity_barriers:
            params['velocity_beta'] = plain['velocity_beta']
        if self.has_acceleration_bound:
            params['acceleration_bound'] = plain['acceleration_bound']
        if self.acceleration_hold_s is not None:
            params['acceleration_hold_s'] = plain['acceleration_hold_s']
        if self.prediction_s is not None:
            params['prediction_s'] = plain['prediction_s']
        if self.lookahead_s is not None:
            params['lookahead_s'] = plain['lookahead_s']
        if self.slow_design is not None:
            params['slow_design_json'] = json.dumps(plain['slow_design'], sort_keys=True)
        params['certificate_id'] = self.certificate_id
        return params

    @classmethod
    def from_parameters(cls, params: dict[str, Any]) -> Certificate:
        """Rebuild a certificate from :meth:`to_parameters` output (or node parameters)."""
        if params.get('certificate_format') != CERTIFICATE_FORMAT:
            raise CertificateError(
                f'not a certificate of format {CERTIFICATE_FORMAT!r} '
                f'(found {params.get("certificate_format")!r})')
        try:
            kwargs: dict[str, Any] = {name: params[name] for name in (
                'joint_names', *_VECTOR_FIELDS, 'condition', 'control_rate_hz',
                'sampling_factor', 'model_hash', 'package_version', 'created', 'certified')}
            kwargs['joint_names'] = [str(x) for x in kwargs['joint_names']]
            kwargs['control_rate_hz'] = float(kwargs['control_rate_hz'])
            kwargs['sampling_factor'] = float(kwargs['sampling_factor'])
            kwargs['certified'] = bool(kwargs['certified'])
            kwargs['alpha1'] = ClassK(str(params['alpha1_kind']), float(params['alpha1_scale']))
            kwargs['alpha2'] = ClassK(str(params['alpha2_kind']), float(params['alpha2_scale']))
            low, high = (float(x) for x in params['payload_mass_range'])
            kwargs['payload_mass_range'] = (low, high)
            kwargs['payload_point'] = tuple(float(x) for x in params['payload_point'])
            kwargs['settings'] = json.loads(params.get('settings_json', '{}'))
            kwargs['falsifier'] = json.loads(params.get('falsifier_json', '{}'))
            kwargs['reasons'] = [str(r) for r in params.get('reasons', []) if str(r)]
            if params.get('velocity_beta') is not None:
                kwargs['velocity_beta'] = [float(x) for x in params['velocity_beta']]
            if params.get('acceleration_bound') is not None:
                kwargs['acceleration_bound'] = [float(x) for x in params['acceleration_bound']]
            if params.get('acceleration_hold_s') is not None:
                kwargs['acceleration_hold_s'] = float(params['acceleration_hold_s'])
            if params.get('prediction_s') is not None:
                kwargs['prediction_s'] = float(params['prediction_s'])
            if params.get('lookahead_s') is not None:
                kwargs['lookahead_s'] = float(params['lookahead_s'])
            if params.get('slow_design_json'):
                slow = json.loads(params['slow_design_json'])
                if not isinstance(slow, dict):
                    raise CertificateError('slow_design_json is not a parameter mapping')
                kwargs['slow_design'] = cls.from_parameters(slow)
        except KeyError as err:
            raise CertificateError(f'the certificate lacks the entry {err.args[0]!r}') from err
        except (TypeError, ValueError) as err:
            raise CertificateError(f'malformed certificate entry: {err}') from err
        certificate = cls(**kwargs)
        stored_id = params.get('certificate_id')
        if stored_id is not None and stored_id != certificate.certificate_id:
            raise CertificateError(
                f'certificate id {stored_id} does not match its content '
                f'({certificate.certificate_id}): the file was edited after certification')
        return certificate

    def save(self, path: str | Path, node_name: str = PARAMETER_FILE_KEY) -> Path:
        """Write the parameter file (``--params-file`` YAML keyed by ``node_name``; default
        ``/**``: the node it is given to, in any namespace, under any name)."""
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        header = (
            '# safety_filter certificate: ROS 2 parameter file for the filter node.\n'
            '# Generated by `safety-filter certify`; do not edit by hand (the certificate id\n'
            '# covers the content and the node refuses an edited file). The key below is\n'
            '# not covered: "/**" applies it to the node it is given to, in any namespace;\n'
            '# give it to the filter node only.\n')
        document = {node_name: {'ros__parameters': self.to_parameters()}}
        path.write_text(header + yaml.safe_dump(document, sort_keys=False, width=100),
                        encoding='utf-8')
        return path

    @classmethod
    def load(cls, path: str | Path, model: RobotModel | None = None) -> Certificate:
        """Read a parameter file written by :meth:`save`; checks ``model`` when given."""
        document = read_yaml_file(path, CertificateError, 'certificate file')
        if not isinstance(document, dict) or not document:
            raise CertificateError('not a parameter file', path)
        # Accept any node key (the user may have renamed the node) but only one.
        sections = [v for v in document.values()
                    if isinstance(v, dict) and 'ros__parameters' in v]
        if len(sections) != 1:
            raise CertificateError('expected one node section with ros__parameters', path)
        certificate = cls.from_parameters(sections[0]['ros__parameters'])
        if model is not None:
            certificate.check_model(model)
        return certificate

    def summary(self) -> dict[str, Any]:
        """JSON-ready content (for reports)."""
        plain = self._plain()
        plain['certificate_id'] = self.certificate_id
        return plain


def _show(values: np.ndarray) -> str:
    return '[' + ', '.join(f'{float(x):.6g}' for x in np.ravel(values)) + ']'


def _rounded_record(record: Any) -> Any:
    """A record with numbers rounded to 12 significant digits (as the model hash rounds)."""
    if isinstance(record, dict):
        return {str(k): _rounded_record(v) for k, v in record.items()}
    if isinstance(record, (list, tuple)):
        return [_rounded_record(v) for v in record]
    if isinstance(record, bool) or record is None or isinstance(record, str):
        return record
    try:
        return format(float(record), '.12g')
    except (TypeError, ValueError):
        return repr(record)
