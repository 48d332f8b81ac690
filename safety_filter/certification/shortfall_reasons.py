"""Why a certification falls short, in words with numbers: per joint, what limits its
velocity box, and why no design certified (the gravity load, the declared model error, or
the sampled-data margin, with what would help).
"""

from __future__ import annotations

import numpy as np

from safety_filter.certification.authority import authority_problem
from safety_filter.certification.certify_settings import CertifySettings
from safety_filter.certification.design_formulas import Design
from safety_filter.certification.dynamics_bounds import DynamicsBounds
from safety_filter.certification.sampled_data_margin import sampled_inverse_mass
from safety_filter.certification.velocity_boxes import design_for_box, safe_set_areas
from safety_filter.core.robot_model import RobotModel

ENVELOPE_REPORTED_BELOW = 0.8  # box fractions below this get a reason in the certificate


def what_limits_the_box(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                         kind: str, start: Design, design: Design, margin: np.ndarray
                         ) -> list[str]:
    """Per joint, why its velocity box is below ``ENVELOPE_REPORTED_BELOW`` of its rated
    speed ('' where it is not): the torque limits (at the top of the box the dynamics
    bounds leave some joint no authority, or the joint's own authority falls so far that its
    safe set would not grow), the coupling (a faster box for it shrinks
    another joint's safe set; the text names the joint that loses most, and by how much),
    or the sampled-data margin (which cost the box the search chose a share of it)."""
    limits = []
    names = list(model.joint_names)
    top = settings.top_velocity_fraction
    before = safe_set_areas(model, start)
    for i in range(model.n_joints):
        fraction = float(design.fractions[i])
        if fraction >= ENVELOPE_REPORTED_BELOW:
            limits.append('')
            continue
        trial = start.fractions.copy()
        trial[i] = top
        faster, _ = design_for_box(model, bounds, settings, trial, np.zeros(len(margin)),
                                    kind)
        if faster is None:
            text = (f'torque: at {100 * top:.0f} % of its rated speed the Coriolis and gravity '
                    'bounds leave some joint no authority')
        else:
            change = safe_set_areas(model, faster) / np.maximum(before, 1e-300) - 1.0
            others = [j for j in range(model.n_joints) if j != i]
            loser = others[int(np.argmin(change[others]))] if others else i
            if change[i] <= 0.005:
                text = (f'torque: at {100 * top:.0f} % of its rated speed its own safe set '
                        f'would change by {100 * change[i]:+.0f} %: the Coriolis torque of a '
                        'faster box takes the authority that braking needs')
            elif loser != i and change[loser] < 0.0:
                text = (f'coupling: at {100 * top:.0f} % of its rated speed its safe set would '
                        f'grow by {100 * change[i]:.0f} % and that of {names[loser]!r} shrink '
                        f'by {-100 * change[loser]:.0f} % (their torques share the limits '
                        'through the Coriolis and inertia bounds)')
            else:
                text = (f'search: at {100 * top:.0f} % of its rated speed its safe set would '
                        f'grow by {100 * change[i]:.0f} % and no other would shrink, but the '
                        'coordinate search stopped below it')
        kept = fraction / float(start.fractions[i])
        if kept < 0.999:
            text += (f'; then sampling: the sampled-data margin cost the box the search chose '
                     f'({100 * start.fractions[i]:.0f} %) {100 * (1 - kept):.0f} % of it')
        limits.append(text)
    return limits


def explain_model_error_shortfall(model: RobotModel, bounds: DynamicsBounds,
                                   settings: CertifySettings) -> list[str]:
    """Joints whose effort limit the declared uncertainty uses up even at the slowest
    velocity box tried, with each kind's share (empty when it does not)."""
    names = list(model.joint_names)
    umax = np.array(model.effort_limit)
    box = np.array(model.velocity_limit) / settings.velocity_scales
    problem = authority_problem(model, bounds, settings, box)
    bias, disturbance = problem.bias, problem.disturbance
    exact_bias = authority_problem(model, bounds, settings, box, exact_model=True).bias
    reasons = []
    for i in np.flatnonzero(bias >= umax):
        if exact_bias[i] >= umax[i]:
            continue  # the model itself is short there: the other reasons say so
        shares = {kind: float(value[i]) for kind, value in disturbance.static.items()
                  if kind != 'payload' and value[i] > 0.0}
        listed = ', '.join(f'{kind} {value:.3g}' for kind, value in
                           sorted(shares.items(), key=lambda item: -item[1]))
        reasons.append(
            f'joint {names[i]!r}: with the declared uncertainty its bias bound reaches '
            f'{bias[i]:.4g} N m against an effort limit of {umax[i]:.4g} (short by '
            f'{bias[i] - umax[i]:.4g} N m; the model alone needs {exact_bias[i]:.4g}): '
            f'model error [N m] {listed}; narrow the uncertainty section of the limits file '
            '(docs/limits-file.md) where you know better, or raise the effort limit')
    return reasons


def margin_shortfall_reason(model: RobotModel, settings: CertifySettings, i: int,
                             margin: float, authority: float) -> str:
    """Why joint ``i`` lacks more than its authority within one hold, and what would help:
    the URDF's damping when a damping mode (the joint's own, or a coupled joint's through
    ``M^-1``) is faster than the hold, else the control rate that would do (or that none
    below 10 kHz would)."""
    names = list(model.joint_names)
    hold_ms = 1000 * settings.hold_period_s
    what = ('after the declared delay, which the filter predicts over' if settings.prediction_s
            else 'with the declared delay as part of it')
    text = (f'joint {names[i]!r}: within one hold of {hold_ms:.3g} ms ({what}) the state '
            f'leaves S unless {margin:.4g} rad/s^2 is '
            f'reserved, more than its authority {authority:.4g} rad/s^2')
    viscous = np.array(model.viscous_friction)
    inverse = sampled_inverse_mass(model)
    coupling = np.max(np.abs(inverse[:, i, :]), axis=0) * viscous  # [1/s] per joint j
    j = int(np.argmax(coupling))
    if coupling[j] * settings.hold_period_s > 0.2:
        inertia = 1.0 / float(np.max(inverse[:, j, j]))
        source = ('its own damping' if j == i else
                  f'the damping of joint {names[j]!r}, through the coupling of the inertia '
                  f'matrix (|M^-1| up to {np.max(np.abs(inverse[:, i, j])):.4g})')
        return (text + f': {source}: the URDF gives {names[j]!r} {viscous[j]:.4g} N m s/rad '
                f'of viscous damping on as little as {inertia:.3g} kg m^2 of link inertia, a '
                f'time constant of {1000 * inertia / viscous[j]:.3g} ms against the '
                f'{hold_ms:.3g} ms hold, so the held torque acts differently by the end of it. '
                'A faster control rate '
                'helps little (the disturbance observer then costs more authority); check that '
                "damping value, and the inertia of the joint (a geared joint's rotor inertia "
                'is not in a URDF but slows this mode by the square of the gear ratio)')
    rate = settings.control_rate_hz * margin / authority
    if rate > 10_000.0:
        return (text + f': no control rate below 10 kHz would do (about {rate:.0f} Hz by '
                'scaling); lower the velocity limits or raise the effort limits')
    return text + f': raise the control rate above {rate:.0f} Hz'


def explain_no_design(model: RobotModel, bounds: DynamicsBounds, settings: CertifySettings,
                       margin: np.ndarray, last_design: Design | None) -> list[str]:
    """Per-joint reasons why no velocity scale gave positive authority, with numbers."""
    names = list(model.joint_names)
    umax = np.array(model.effort_limit)
    static = bounds.gravity_max + np.array(model.coulomb_friction)
    reasons = []
    for i in np.flatnonzero(static >= umax):
        text = (f'joint {names[i]!r}: the gravity load reaches {bounds.gravity_max[i]:.4g} N m '
                f'(with Coulomb friction {static[i]:.4g}) but the effort limit is '
                f'{umax[i]:.4g}: short by {static[i] - umax[i]:.4g} N m; raise the effort limit '
                f'above {static[i] * 1.1:.4g} or reduce the load')
        if model.payload.mass_max > 0.0:
            text += (f' (the payload range goes up to {model.payload.mass_max:g} kg; '
                     'a lighter maximum payload lowers the gravity load)')
        reasons.append(text)
    if reasons:
        return reasons
    reasons = explain_model_error_shortfall(model, bounds, settings)
    if reasons:
        return reasons
    if last_design is not None:
        short = np.flatnonzero(margin >= last_design.authority)
        if len(short) == 0:
            # Every joint kept some authority, but the margin -> gains -> margin iteration did
            # not settle (each round re-estimates the margin from new rollouts).
            return [f'the sampled-data margin did not settle down to velocity scale '
                    f'{last_design.scale:.3g}: last margin per joint '
                    f'{", ".join(f"{names[i]!r} {margin[i]:.4g}" for i in range(len(names)))}'
                    f' rad/s^2; raise margin_samples (now {settings.margin_samples}) or the '
                    'control rate']
        return [margin_shortfall_reason(model, settings, i, margin[i],
                                         last_design.authority[i]) for i in short]
    return ['no velocity envelope gives positive authority to every joint: the Coriolis and '
            'gravity bounds exceed the effort limits; lower the velocity limits or raise the '
            'effort limits']
