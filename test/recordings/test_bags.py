"""Bag writing and reading (safety_filter.recordings.bags), checked with rosbags' own reader.

Every bag written here is read back twice: with our helpers and with ``rosbags``' high-level
``AnyReader`` (an independent reader that takes the message definitions from the bag
itself), in both storages.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from safety_filter.recordings import bags

JOINTS = ['j0', 'j1', 'j2']


def _write_sample_bag(path: Path, storage: str, steps: int = 20) -> None:
    status_fields = 'stamp_s,mode,margin.j0,margin.j1,margin.j2'
    with bags.BagWriter(path, storage) as writer:
        for k in range(steps):
            t = 1_700_000_000_000_000_000 + k * 1_000_000
            q = np.array([0.1 * k, -0.2 * k, 0.5])
            writer.write_joint_state(bags.TOPIC_JOINT_STATES, t, t - 500, JOINTS, q,
                                     q + 1.0, q + 2.0)
            writer.write_float64_array(bags.TOPIC_NOMINAL, t + 10, [k, 2.0 * k, 3.0 * k])
            writer.write_float64_array(bags.TOPIC_STATUS, t + 20,
                                       [1e-9 * t, k % 2, 0.1, 0.2, -0.3 * k],
                                       label=status_fields)
            if k % 10 == 0:
                types = bags.typestore().types
                status = types['diagnostic_msgs/msg/DiagnosticStatus'](
                    level=k // 10, name='safety_filter: filter', message=f'step {k}',
                    hardware_id='arm', values=[types['diagnostic_msgs/msg/KeyValue'](
                        key='mode', value='filtered')])
                array = types[bags.DIAGNOSTIC_ARRAY](
                    header=bags.joint_state_message(t, [], []).header, status=[status])
                writer.write(bags.TOPIC_DIAGNOSTICS, t + 30, array)


@pytest.mark.parametrize('storage', bags.STORAGES)
def test_write_then_read_back(tmp_path: Path, storage: str) -> None:
    path = tmp_path / 'bag'
    _write_sample_bag(path, storage)
    summary = bags.topic_summary(path)
    assert {t: (i.msgtype, i.count) for t, i in summary.items()} == {
        bags.TOPIC_JOINT_STATES: (bags.JOINT_STATE, 20),
        bags.TOPIC_NOMINAL: (bags.FLOAT64_ARRAY, 20),
        bags.TOPIC_STATUS: (bags.FLOAT64_ARRAY, 20),
        bags.TOPIC_DIAGNOSTICS: (bags.DIAGNOSTIC_ARRAY, 2),
    }
    states = bags.read_joint_states(path, ['j2', 'j0'])
    assert states.joint_names == ['j2', 'j0']
    np.testing.assert_array_equal(states.position[:, 1], 0.1 * np.arange(20))
    np.testing.assert_array_equal(states.position[:, 0], 0.5)
    np.testing.assert_array_equal(states.velocity, states.position + 1.0)
    np.testing.assert_array_equal(states.effort, states.position + 2.0)
    np.testing.assert_array_equal(states.log_time_ns - states.stamp_ns, 500)
    nominal = bags.read_float64_arrays(path, bags.TOPIC_NOMINAL)
    np.testing.assert_array_equal(nominal.data[:, 2], 3.0 * np.arange(20))
    status = bags.read_status(path)
    assert set(status) == {'stamp_s', 'mode', 'margin.j0', 'margin.j1', 'margin.j2',
                           'log_time_ns'}
    np.testing.assert_array_equal(status['mode'], np.arange(20) % 2)
    diagnostics = bags.read_diagnostics(path)
    assert [(d.level, d.message, d.values) for d in diagnostics] == [
        (0, 'step 0', {'mode': 'filtered'}), (1, 'step 10', {'mode': 'filtered'})]
    assert sorted(p.suffix for p in path.iterdir()) == sorted(
        ['.yaml', '.mcap' if storage == 'mcap' else '.db3'])


@pytest.mark.parametrize('storage', bags.STORAGES)
def test_rosbags_reads_our_bags_with_their_own_definitions(tmp_path: Path,
                                                           storage: str) -> None:
    from rosbags.highlevel import AnyReader

    path = tmp_path / 'bag'
    _write_sample_bag(path, storage, steps=5)
    with AnyReader([path]) as reader:  # message definitions from the bag, not our store
        types = {c.topic: c.msgtype for c in reader.connections}
        assert types[bags.TOPIC_JOINT_STATES] == 'sensor_msgs/msg/JointState'
        for connection in reader.connections:
            assert connection.msgdef.data, connection.topic  # definitions are stored
        positions = [reader.deserialize(data, c.msgtype).position for c, _, data
                     in reader.messages([c for c in reader.connections
                                         if c.topic == bags.TOPIC_JOINT_STATES])]
    np.testing.assert_array_equal(np.array(positions)[:, 0], 0.1 * np.arange(5))


def test_cdr_bytes_are_stored_as_given(tmp_path: Path) -> None:
    message = bags.float64_array_message([1.0, -2.5], label='joints')
    data = bytes(bags.typestore().serialize_cdr(message, bags.FLOAT64_ARRAY))
    path = tmp_path / 'bag'
    with bags.BagWriter(path) as writer:
        writer.write_cdr(bags.TOPIC_COMMAND, bags.FLOAT64_ARRAY, 42, data)
        assert writer.counts == {bags.TOPIC_COMMAND: 1}
    ((log_time, read),) = list(bags.read_messages(path, bags.TOPIC_COMMAND))
    assert log_time == 42
    np.testing.assert_array_equal(read.data, [1.0, -2.5])
    assert read.layout.dim[0].label == 'joints'


def test_errors(tmp_path: Path) -> None:
    path = tmp_path / 'bag'
    with bags.BagWriter(path) as writer:
        writer.write_float64_array(bags.TOPIC_NOMINAL, 1, [1.0])
        with pytest.raises(bags.BagError, match='written as'):
            writer.write_joint_state(bags.TOPIC_NOMINAL, 2, 2, ['a'], [0.0])
        with pytest.raises(bags.BagError, match='unknown message type'):
            writer.write_cdr('/x', 'my_msgs/msg/Nope', 3, b'')
        with pytest.raises(bags.BagError, match='not a typestore message'):
            writer.write('/x', 3, object())
    with pytest.raises(bags.BagError, match='closed'):
        writer.write_float64_array(bags.TOPIC_NOMINAL, 4, [1.0])
    with pytest.raises(bags.BagError, match='exists'):
        bags.BagWriter(path)
    with pytest.raises(bags.BagError, match='storage'):
        bags.BagWriter(tmp_path / 'other', storage='csv')
    with pytest.raises(bags.BagError, match='no such bag'):
        bags.topic_summary(tmp_path / 'missing')
    (tmp_path / 'empty').mkdir()
    with pytest.raises(bags.BagError, match='not a rosbag2 folder'):
        bags.topic_summary(tmp_path / 'empty')
    assert bags.read_status(path) == {}


def test_type_hashes_are_the_ones_ros_jazzy_generates(tmp_path: Path) -> None:
    # The ROS 2 message packages install their type descriptions (with the RIHS01 hash the
    # middleware matches on) as share/<package>/msg/<Type>.json; compare with the bag's.
    import json
    import sys

    path = tmp_path / 'bag'
    _write_sample_bag(path, 'mcap', steps=2)
    metadata = (path / 'metadata.yaml').read_text(encoding='utf-8')
    checked = 0
    for msgtype in (bags.JOINT_STATE, bags.FLOAT64_ARRAY, bags.DIAGNOSTIC_ARRAY):
        package, _, name = msgtype.split('/')
        description = Path(sys.prefix) / 'share' / package / 'msg' / f'{name}.json'
        if not description.is_file():
            continue
        document = json.loads(description.read_text(encoding='utf-8'))
        hashes = [entry['hash_string'] for entry in document['type_hashes']
                  if entry['type_name'] == msgtype]
        assert hashes and hashes[0] in metadata, msgtype
        checked += 1
    if not checked:
        pytest.skip('no ROS 2 type descriptions installed (pip install -e ".[ros]")')


@pytest.mark.parametrize('storage', bags.STORAGES)
def test_status_with_field_names_sent_once_reads_like_the_old_layout(
        tmp_path: Path, storage: str) -> None:
    """The node's layout since the field names moved to ~/status_fields: lean records plus
    one String of names (offered transient-local); read back to the same columns as the
    earlier self-describing records. Without the names topic the joint names supply them."""
    from rosbags.highlevel import AnyReader

    from safety_filter.online.status_layout import status_field_names

    fields = status_field_names(JOINTS)
    rows = np.arange(5 * len(fields), dtype=float).reshape(5, len(fields))
    lean, old, bare = tmp_path / 'lean', tmp_path / 'old', tmp_path / 'bare'
    with bags.BagWriter(lean, storage) as writer:
        writer.write(bags.TOPIC_STATUS_FIELDS, 5, bags.string_message(','.join(fields)))
        for k, row in enumerate(rows):
            writer.write_float64_array(bags.TOPIC_STATUS, 10 + k, row)
    with bags.BagWriter(old, storage) as writer:
        for k, row in enumerate(rows):
            writer.write_float64_array(bags.TOPIC_STATUS, 10 + k, row, label=','.join(fields))
    with bags.BagWriter(bare, storage) as writer:
        for k, row in enumerate(rows):
            writer.write_float64_array(bags.TOPIC_STATUS, 10 + k, row)
    new_layout, old_layout = bags.read_status(lean), bags.read_status(old)
    assert list(new_layout) == fields + ['log_time_ns']
    for name in [*fields, 'log_time_ns']:
        np.testing.assert_array_equal(new_layout[name], old_layout[name])
    np.testing.assert_array_equal(new_layout['velocity.j2'], rows[:, -1])
    # A recording without the names: an error that says where they are, unless the joint
    # names are given (and fit the record length).
    with pytest.raises(bags.BagError, match='status_fields'):
        bags.read_status(bare)
    derived = bags.read_status(bare, joint_names=JOINTS)
    np.testing.assert_array_equal(derived['margin.j0'], rows[:, 8])
    with pytest.raises(bags.BagError, match='for records of'):
        bags.read_status(bare, joint_names=JOINTS[:2])
    # The names topic is offered transient-local, as the node publishes it.
    with AnyReader([lean]) as reader:
        (connection,) = [c for c in reader.connections
                         if c.topic == bags.TOPIC_STATUS_FIELDS]
        durability = connection.ext.offered_qos_profiles[0].durability
    assert durability.name == 'TRANSIENT_LOCAL'
