"""Bags for the replay tests, written with ``rosbags`` from simulated runs of the filter.

:func:`record_filtered_run` runs :class:`ArmSimulator` + :class:`SafetyFilter` + a nominal
policy at a control rate and keeps what a recorder would have seen. :func:`write_run_bag`
writes it as a rosbag2 bag (sqlite3 or MCAP storage), with the message timing the filter
node sees: the joint state at ``t``, the nominal at ``t + 1 us`` and the filtered torque at
``t + 2 us``, and optional damage (duplicated or reordered messages, a gap, shuffled or
missing joint names, a missing topic). It uses ``rosbags`` directly (not the package's own
writer) so that the tests read bags made independently of the code under test.
"""

from __future__ import annotations

import hashlib
import shutil
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from safety_filter.core.certificate import Certificate
from safety_filter.core.robot_model import RobotModel
from safety_filter.online.barrier_filter import SafetyFilter
from safety_filter.simulation.plant import ArmSimulator

START_NS = 1_700_000_000_000_000_000  # a bag time in 2023 [ns]: epoch-sized stamps
NOMINAL_DELAY_NS = 1_000
FILTERED_DELAY_NS = 2_000
JOINT_STATE = 'sensor_msgs/msg/JointState'
FLOAT64_ARRAY = 'std_msgs/msg/Float64MultiArray'


@dataclass
class RecordedRun:
    """A simulated filtered run: one row per control step (joint state time ``stamp_ns``)."""

    joint_names: list[str]
    stamp_ns: np.ndarray
    q: np.ndarray
    v: np.ndarray
    nominal: np.ndarray
    torque: np.ndarray
    modes: list[str]


def planar2_certificate() -> tuple[RobotModel, Certificate]:
    """planar2 and its session certificate (the real certification with the default
    settings, once per test session and shared with the other tests: ``certify_fixtures``).
    """
    from certify_fixtures import demo_certificate

    return demo_certificate('planar2')


def record_filtered_run(model: RobotModel, certificate: Certificate,
                        policy: Callable[[float, np.ndarray, np.ndarray], np.ndarray],
                        duration_s: float, rate_hz: float = 1000.0,
                        q0: np.ndarray | None = None, payload_mass: float | None = None,
                        internal_rate_hz: float = 10_000.0, start_ns: int = START_NS
                        ) -> RecordedRun:
    """Run nominal -> filter -> simulated arm and keep the recorder's view of it. The arm
    applies each torque the certificate's predicted delay late (``prediction_s``, in whole
    periods), the one before until then, as a driver with that delay would."""
    filt = SafetyFilter(model, certificate, payload_mass=payload_mass)
    simulator = ArmSimulator(model, filt.payload_mass, internal_rate_hz)
    if q0 is None:
        q0 = 0.5 * (np.array(model.position_lower) + np.array(model.position_upper))
    simulator.reset(q0)
    period_ns = int(round(1e9 / rate_hz))
    steps = int(round(duration_s * rate_hz))
    n = model.n_joints
    run = RecordedRun(list(model.joint_names), start_ns + period_ns * np.arange(steps),
                      np.zeros((steps, n)), np.zeros((steps, n)), np.zeros((steps, n)),
                      np.zeros((steps, n)), [])
    delay = int(round((certificate.prediction_s or 0.0) * rate_hz))
    sent: list[np.ndarray] = []
    for k in range(steps):
        q, v = simulator.q.copy(), simulator.v.copy()
        u_nom = np.asarray(policy(k * period_ns * 1e-9, q, v), dtype=float)
        out = filt.step(q, v, u_nom)
        run.q[k], run.v[k], run.nominal[k], run.torque[k] = q, v, u_nom, out.torque
        run.modes.append(str(out.mode))
        sent.append(np.array(out.torque))
        simulator.advance(sent[max(0, k - delay)], period_ns * 1e-9)
    return run


def _typestore() -> Any:
    from rosbags.typesys import Stores, get_typestore

    return get_typestore(Stores.ROS2_JAZZY)


def write_run_bag(
    path: str | Path,
    run: RecordedRun,
    storage: str = 'mcap',
    *,
    joint_order: Sequence[int] | None = None,
    extra_joints: dict[str, float] | None = None,
    rename: dict[str, str] | None = None,
    topics: dict[str, str] | None = None,
    omit: Sequence[str] = (),
    duplicate_states: Sequence[int] = (),
    swap_states: Sequence[int] = (),
    gap: tuple[int, int] | None = None,
    bare: bool = False,
    extra_topic: bool = True,
) -> Path:
    """Write ``run`` as a rosbag2 bag at ``path`` (a folder; or an .mcap/.db3 file: bare).

    Args:
        storage: ``'mcap'`` or ``'sqlite3'``.
        joint_order: permutation of the chain joints in the JointState messages.
        extra_joints: joints not in the chain, with their (constant) position.
        rename: joint names to replace in the JointState messages (a chain joint missing).
        topics: topic names for 'joint_states', 'nominal', 'filtered'.
        omit: of 'joint_states', 'nominal', 'filtered': topics not written.
        duplicate_states: steps whose joint state is written twice at the same bag time
            (the copy with a perturbed position).
        swap_states: steps k whose joint state is swapped in bag time with step k + 1 (the
            header stamps stay: messages that arrived out of order).
        gap: steps ``[a, b)`` with no message at all.
        bare: write only the storage file (no metadata.yaml) at ``path``.
        extra_topic: also write an unrelated ``/chatter`` string topic.
    """
    from rosbags.rosbag2 import StoragePlugin, Writer

    store = _typestore()
    types = store.types
    names = {'joint_states': '/joint_states', 'nominal': '/nominal_torque',
             'filtered': '/filtered_torque', **(topics or {})}
    path = Path(path)
    folder = Path(tempfile.mkdtemp(prefix='bag_', dir=path.parent)) / 'bag' if bare else path
    plugin = StoragePlugin.MCAP if storage == 'mcap' else StoragePlugin.SQLITE3
    writer = Writer(folder, version=9, storage_plugin=plugin)
    writer.open()
    connections = {key: writer.add_connection(
        names[key], JOINT_STATE if key == 'joint_states' else FLOAT64_ARRAY, typestore=store)
        for key in ('joint_states', 'nominal', 'filtered') if key not in omit}
    chatter = (writer.add_connection('/chatter', 'std_msgs/msg/String', typestore=store)
               if extra_topic else None)
    n = len(run.joint_names)
    order = list(joint_order) if joint_order is not None else list(range(n))
    extra = dict(extra_joints or {})
    msg_names = [run.joint_names[i] for i in order] + list(extra)
    msg_names = [(rename or {}).get(name, name) for name in msg_names]
    state_times = np.array(run.stamp_ns, dtype=np.int64)
    for k in swap_states:
        state_times[[k, k + 1]] = state_times[[k + 1, k]]

    def joint_state(k: int, stamp: int, bump: float = 0.0) -> bytes:
        sec, nanosec = divmod(int(stamp), 1_000_000_000)
        header = types['std_msgs/msg/Header'](
            stamp=types['builtin_interfaces/msg/Time'](sec=sec, nanosec=nanosec), frame_id='')
        position = np.concatenate([run.q[k][order] + bump, list(extra.values())])
        velocity = np.concatenate([run.v[k][order], np.zeros(len(extra))])
        message = types[JOINT_STATE](header=header, name=msg_names, position=position,
                                     velocity=velocity, effort=np.zeros(0))
        return store.serialize_cdr(message, JOINT_STATE)

    def array(values: np.ndarray) -> bytes:
        layout = types['std_msgs/msg/MultiArrayLayout'](dim=[], data_offset=0)
        message = types[FLOAT64_ARRAY](layout=layout, data=np.asarray(values, dtype=float))
        return store.serialize_cdr(message, FLOAT64_ARRAY)

    for k in range(len(run.stamp_ns)):
        if gap is not None and gap[0] <= k < gap[1]:
            continue
        t = int(run.stamp_ns[k])
        if 'joint_states' in connections:
            writer.write(connections['joint_states'], int(state_times[k]), joint_state(k, t))
            if k in duplicate_states:
                writer.write(connections['joint_states'], int(state_times[k]),
                             joint_state(k, t, bump=1e-3))
        if 'nominal' in connections:
            writer.write(connections['nominal'], t + NOMINAL_DELAY_NS, array(run.nominal[k]))
        if 'filtered' in connections:
            writer.write(connections['filtered'], t + FILTERED_DELAY_NS, array(run.torque[k]))
        if chatter is not None and k % 100 == 0:
            text = types['std_msgs/msg/String'](data=f'step {k}')
            writer.write(chatter, t + 500, store.serialize_cdr(text, 'std_msgs/msg/String'))
    writer.close()
    if bare:
        storage_file = next(folder.glob('*.mcap' if storage == 'mcap' else '*.db3'))
        shutil.move(str(storage_file), str(path))
        shutil.rmtree(folder.parent)
    return path


def tree_digest(path: str | Path) -> str:
    """SHA-256 over the names and bytes of a file or of every file under a folder."""
    path = Path(path)
    digest = hashlib.sha256()
    files = [path] if path.is_file() else sorted(p for p in path.rglob('*') if p.is_file())
    for item in files:
        digest.update(str(item.relative_to(path.parent)).encode())
        digest.update(item.read_bytes())
    return digest.hexdigest()


def truncate_storage(bag: str | Path) -> Path:
    """Cut a bag's storage file (a bare file, or the one in a rosbag2 folder) to half."""
    bag = Path(bag)
    target = bag if bag.is_file() else next(p for p in bag.iterdir()
                                            if p.suffix in ('.mcap', '.db3'))
    size = target.stat().st_size
    with open(target, 'r+b') as handle:
        handle.truncate(size // 2)
    return target
