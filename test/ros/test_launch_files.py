"""Static checks of the launch files (``launch`` and ``launch_ros`` are not installed here).

Each ``launch/*.launch.py`` is parsed with ``ast``; every ``Node(...)`` call is resolved
(names bound by simple assignments in the file are followed) and checked against the
package: the package name, the executable among ``setup.py``'s console scripts, every
parameter file either in ``config/`` or a declared launch argument, every remapping source a
topic the node's module really uses, and ``generate_launch_description`` defined. The
runner (``safety-filter run-graph``) must start the same graphs with the same remappings.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass, field
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
LAUNCH_FILES = sorted((REPO / 'launch').glob('*.launch.py'))
PACKAGE = 'safety_filter'


def console_scripts() -> dict[str, str]:
    """``name -> module`` of setup.py's console scripts (parsed, not imported)."""
    tree = ast.parse((REPO / 'setup.py').read_text(encoding='utf-8'))
    for node in ast.walk(tree):
        if isinstance(node, ast.keyword) and node.arg == 'entry_points':
            entry_points = ast.literal_eval(node.value)
            scripts = {}
            for line in entry_points['console_scripts']:
                name, target = (part.strip() for part in line.split('='))
                scripts[name] = target.split(':')[0]
            return scripts
    raise AssertionError('setup.py has no entry_points')


@dataclass
class NodeCall:
    """The keywords of one ``Node(...)`` call, with names resolved to expressions."""

    line: int
    keywords: dict[str, ast.expr] = field(default_factory=dict)


class LaunchFile:
    """A parsed launch file: its assignments, declared arguments and Node calls."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.tree = ast.parse(path.read_text(encoding='utf-8'), filename=str(path))
        self.assignments: dict[str, ast.expr] = {}
        for node in ast.walk(self.tree):
            if isinstance(node, ast.Assign) and len(node.targets) == 1 \
                    and isinstance(node.targets[0], ast.Name):
                self.assignments[node.targets[0].id] = node.value
        self.arguments = {
            call.args[0].value for call in self._calls('DeclareLaunchArgument')
            if call.args and isinstance(call.args[0], ast.Constant)}
        self.nodes = [NodeCall(call.lineno, {k.arg: self.resolve(k.value)
                                             for k in call.keywords if k.arg})
                      for call in self._calls('Node')]

    def _calls(self, name: str) -> list[ast.Call]:
        found = []
        for node in ast.walk(self.tree):
            if isinstance(node, ast.Call):
                func = node.func
                called = func.id if isinstance(func, ast.Name) else getattr(func, 'attr', '')
                if called == name:
                    found.append(node)
        return found

    def resolve(self, expression: ast.expr) -> ast.expr:
        """Follow a name to the expression assigned to it (once per name)."""
        seen = set()
        while isinstance(expression, ast.Name) and expression.id in self.assignments \
                and expression.id not in seen:
            seen.add(expression.id)
            expression = self.assignments[expression.id]
        return expression

    def function_names(self) -> set[str]:
        return {node.name for node in self.tree.body if isinstance(node, ast.FunctionDef)}


def _call_name(expression: ast.expr) -> str:
    if isinstance(expression, ast.Call):
        func = expression.func
        return func.id if isinstance(func, ast.Name) else getattr(func, 'attr', '')
    return ''


def _string(expression: ast.expr) -> str | None:
    return expression.value if isinstance(expression, ast.Constant) \
        and isinstance(expression.value, str) else None


def _elements(launch: LaunchFile, expression: ast.expr) -> list[ast.expr]:
    expression = launch.resolve(expression)
    assert isinstance(expression, (ast.List, ast.Tuple)), ast.dump(expression)
    items: list[ast.expr] = []
    for element in expression.elts:
        if isinstance(element, ast.Starred):
            items += _elements(launch, element.value)
        else:
            items.append(launch.resolve(element))
    return items


def _module_source(executable: str) -> str:
    """The source of an executable's module and of the ROS modules of this package it
    imports (the node class may live beside the entry point)."""
    def source(module: str) -> str:
        return (REPO / Path(*module.split('.'))).with_suffix('.py').read_text(encoding='utf-8')

    module = console_scripts()[executable]
    text = source(module)
    imported = {node.module for node in ast.walk(ast.parse(text))
                if isinstance(node, ast.ImportFrom) and node.module
                and node.module.startswith('safety_filter.ros.')}
    return '\n'.join([text, *(source(name) for name in sorted(imported))])


@pytest.fixture(scope='module', params=[p.name for p in LAUNCH_FILES])
def launch_file(request: pytest.FixtureRequest) -> LaunchFile:
    return LaunchFile(REPO / 'launch' / request.param)


def test_there_are_the_two_launch_files() -> None:
    names = {p.name for p in LAUNCH_FILES}
    assert {'sim_demo.launch.py', 'hardware.launch.py'} <= names


def test_defines_generate_launch_description(launch_file: LaunchFile) -> None:
    assert 'generate_launch_description' in launch_file.function_names()
    assert launch_file.nodes, 'no Node(...) in the launch file'


def test_nodes_name_package_and_existing_executables(launch_file: LaunchFile) -> None:
    scripts = console_scripts()
    for node in launch_file.nodes:
        assert _string(node.keywords['package']) == PACKAGE, node.line
        executable = _string(node.keywords['executable'])
        assert executable in scripts, f'line {node.line}: {executable} not in console_scripts'
        assert _string(node.keywords.get('name', ast.Constant(None))), \
            f'line {node.line}: give the node a name (parameter files are keyed by it)'


def test_parameter_files_exist_or_are_launch_arguments(launch_file: LaunchFile) -> None:
    for node in launch_file.nodes:
        for item in _elements(launch_file, node.keywords.get('parameters', ast.List([]))):
            if isinstance(item, ast.Dict):
                continue  # inline parameters
            name = _call_name(item)
            if name == 'LaunchConfiguration':
                argument = _string(item.args[0])
                assert argument in launch_file.arguments, \
                    f'line {node.line}: parameter file {argument} is not a launch argument'
            elif name == 'PathJoinSubstitution':
                parts = [_string(part) for part in _elements(launch_file, item.args[0])]
                assert parts[-2] == 'config', parts
                assert (REPO / 'config' / parts[-1]).is_file(), f'config/{parts[-1]} missing'
            else:
                path = _string(item)
                assert path is not None, f'line {node.line}: unknown parameter {ast.dump(item)}'
                assert (REPO / 'config' / Path(path).name).is_file(), path


def test_launch_configurations_are_declared(launch_file: LaunchFile) -> None:
    used = {call.args[0].value for call in launch_file._calls('LaunchConfiguration')
            if call.args and isinstance(call.args[0], ast.Constant)}
    assert used <= launch_file.arguments, used - launch_file.arguments


def test_remapping_sources_are_topics_the_node_uses(launch_file: LaunchFile) -> None:
    for node in launch_file.nodes:
        source_code = _module_source(_string(node.keywords['executable']))
        for pair in _elements(launch_file, node.keywords.get('remappings', ast.List([]))):
            assert isinstance(pair, ast.Tuple) and len(pair.elts) == 2, ast.dump(pair)
            topic = _string(pair.elts[0])
            assert topic, f'line {node.line}: remapping source must be a string'
            assert f"'{topic}'" in source_code, \
                f'line {node.line}: the node never uses the topic {topic!r}'


def test_sim_demo_feeds_the_filter_output_to_the_simulated_driver() -> None:
    launch = LaunchFile(REPO / 'launch' / 'sim_demo.launch.py')
    executables = {_string(n.keywords['executable']): n for n in launch.nodes}
    assert set(executables) == {'sim_arm', 'careless_operator', 'filter_node'}
    remaps = [tuple(_string(e) for e in pair.elts) for pair in
              _elements(launch, executables['filter_node'].keywords['remappings'])]
    assert ('filtered_torque', 'sim_effort_command') in remaps
    assert "COMMAND_TOPIC = 'sim_effort_command'" in _module_source('sim_arm')


def test_the_runner_starts_the_same_graphs(tmp_path: Path) -> None:
    from safety_filter.ros.graph_specs import NODES, hardware_graph, sim_demo_graph
    from safety_filter.simulation.demo_arms import demo_arm_files

    scripts = console_scripts()
    for executable, (module, _) in NODES.items():
        assert scripts.get(executable) == module, executable
    urdf, limits = demo_arm_files('planar2')
    certificate = tmp_path / 'certificate.yaml'
    specs = sim_demo_graph(urdf_path=urdf, limits_path=limits, certificate=certificate,
                           control_rate_hz=1000.0)
    launch = LaunchFile(REPO / 'launch' / 'sim_demo.launch.py')
    by_executable = {s.executable: s for s in specs}
    for node in launch.nodes:
        spec = by_executable[_string(node.keywords['executable'])]
        assert spec.name == _string(node.keywords['name'])
        remaps = [tuple(_string(e) for e in pair.elts) for pair in
                  _elements(launch, node.keywords.get('remappings', ast.List([])))]
        assert sorted(remaps) == sorted(spec.remappings)
        assert any(p.name == 'sim_demo.yaml' for p in spec.parameter_files)
    (hardware,) = hardware_graph(certificate=certificate, urdf_path=urdf,
                                 command_topic='/arm/commands')
    assert hardware.transitions == ('configure',)  # inactive until the user activates it
    (activated,) = hardware_graph(certificate=certificate, urdf_path=urdf,
                                  activate_at_start=True)
    assert activated.transitions == ('configure', 'activate')
    assert ('filtered_torque', '/arm/commands') in hardware.remappings
    assert [p.name for p in hardware.parameter_files] == ['certificate.yaml', 'filter.yaml']


def test_config_files_are_parameter_files_keyed_by_node_name_in_any_namespace() -> None:
    """Keyed '/**/<node name>': a section applies to its node in any namespace (a key of
    the bare name would apply only in the root namespace)."""
    import yaml

    for path in (REPO / 'config').glob('*.yaml'):
        document = yaml.safe_load(path.read_text(encoding='utf-8'))
        assert isinstance(document, dict) and document, path.name
        for node, section in document.items():
            assert set(section) == {'ros__parameters'}, (path.name, node)
            assert node in {'/**/sim_arm', '/**/careless_operator', '/**/safety_filter'}, \
                (path.name, node)


def _default(launch: LaunchFile, argument: str) -> str | None:
    for call in launch._calls('DeclareLaunchArgument'):
        if call.args and _string(call.args[0]) == argument:
            for keyword in call.keywords:
                if keyword.arg == 'default_value':
                    return _string(launch.resolve(keyword.value))
            return None
    raise AssertionError(f'no launch argument {argument!r}')


def _node_arguments(launch: LaunchFile, node: NodeCall) -> list[str]:
    return [_string(item) for item in _elements(launch, node.keywords.get('arguments',
                                                                          ast.List([])))]


def test_hardware_launch_does_not_activate_unless_asked() -> None:
    """The filter starts configured and inactive; only activate_at_start:=true activates it."""
    launch = LaunchFile(REPO / 'launch' / 'hardware.launch.py')
    assert _default(launch, 'activate_at_start') == 'false'
    assert 'autostart' not in launch.arguments
    for node in launch.nodes:
        condition = node.keywords['condition']
        assert _call_name(condition) in ('IfCondition', 'UnlessCondition'), node.line
        (configuration,) = condition.args
        assert _string(configuration.args[0]) == 'activate_at_start', node.line
        arguments = _node_arguments(launch, node)
        if _call_name(condition) == 'IfCondition':
            assert arguments == ['--autostart'], node.line
        else:
            assert '--autostart' not in arguments and arguments == ['--configure-at-start']


def test_sim_arm_command_topic_is_not_the_hardware_default() -> None:
    """A sim graph's filter output and a real arm's driver cannot meet by default."""
    from safety_filter.ros.graph_specs import COMMAND_TOPIC, hardware_graph
    from safety_filter.simulation.demo_arms import demo_arm_files

    hardware = LaunchFile(REPO / 'launch' / 'hardware.launch.py')
    default = _default(hardware, 'command_topic')
    assert default and default != COMMAND_TOPIC
    assert f"COMMAND_TOPIC = '{COMMAND_TOPIC}'" in _module_source('sim_arm')
    urdf, _ = demo_arm_files('planar2')
    (spec,) = hardware_graph(certificate='c.yaml', urdf_path=urdf)
    assert dict(spec.remappings)['filtered_torque'] == default


def test_sim_demo_launch_runs_on_an_isolated_domain() -> None:
    launch = LaunchFile(REPO / 'launch' / 'sim_demo.launch.py')
    settings = {}
    for call in launch._calls('SetEnvironmentVariable'):
        name, value = call.args
        settings[_string(name)] = value
    assert _string(settings['ROS_AUTOMATIC_DISCOVERY_RANGE']) == 'LOCALHOST'
    domain = settings['ROS_DOMAIN_ID']
    assert _call_name(domain) == 'LaunchConfiguration'
    assert _string(domain.args[0]) == 'domain_id'
    (declared,) = [c for c in launch._calls('DeclareLaunchArgument')
                   if _string(c.args[0]) == 'domain_id']
    default = next(k.value for k in declared.keywords if k.arg == 'default_value')
    assert 'randint(150, 199)' in ast.unparse(default)
    # The variables are set before any node starts: the isolation actions come first.
    (function,) = [n for n in launch.tree.body if isinstance(n, ast.FunctionDef)]
    returned = next(n for n in ast.walk(function) if isinstance(n, ast.Return)).value
    order = [n.id for n in ast.walk(returned) if isinstance(n, ast.Name)]
    assert order.index('isolation') < min(order.index(name) for name in
                                          ('sim_arm', 'operator', 'safety_filter'))


def test_run_graph_sim_gets_an_isolated_domain_and_hardware_does_not() -> None:
    from safety_filter.cli.demo import graph_domain

    for _ in range(20):
        domain, localhost_only = graph_domain('sim', None)
        assert 150 <= domain <= 199 and localhost_only
    assert graph_domain('sim', 7) == (7, True)
    assert graph_domain('hardware', None) == (None, False)
    assert graph_domain('hardware', 3) == (3, False)


@pytest.mark.parametrize('launch_name', ['hardware.launch.py', 'sim_demo.launch.py'])
def test_launch_files_take_a_namespace_for_every_node(launch_name: str) -> None:
    """A `namespace` argument (default: the root) that every Node(...) of the file uses, so
    that two arms (or two graphs) can run side by side."""
    launch = LaunchFile(REPO / 'launch' / launch_name)
    assert _default(launch, 'namespace') == ''
    assert launch.nodes
    for node in launch.nodes:
        value = launch.resolve(node.keywords.get('namespace', ast.Constant(None)))
        assert _call_name(value) == 'LaunchConfiguration', f'line {node.line}: no namespace'
        assert _string(value.args[0]) == 'namespace', node.line


def test_hardware_launch_reads_the_robot_from_a_file_or_a_topic() -> None:
    launch = LaunchFile(REPO / 'launch' / 'hardware.launch.py')
    assert _default(launch, 'urdf_path') == '' and _default(launch, 'robot_description_topic') \
        == ''
    for node in launch.nodes:
        inline = [item for item in _elements(launch, node.keywords['parameters'])
                  if isinstance(item, ast.Dict)]
        keys = {_string(k) for item in inline for k in item.keys}
        assert {'urdf_path', 'robot_description_topic', 'limits_path'} <= keys, node.line


def test_the_runner_puts_a_graph_in_a_namespace(tmp_path: Path) -> None:
    from safety_filter.errors import InvalidValue
    from safety_filter.ros.graph_specs import hardware_graph, sim_demo_graph
    from safety_filter.simulation.demo_arms import demo_arm_files

    urdf, limits = demo_arm_files('planar2')
    certificate = tmp_path / 'certificate.yaml'
    (spec,) = hardware_graph(certificate=certificate, urdf_path=urdf, namespace='left')
    assert spec.namespace == '/left' and spec.fully_qualified_name == '/left/safety_filter'
    arguments = spec.ros_arguments(None, 'warn')
    assert arguments[arguments.index('__ns:=/left') - 1] == '-r'
    assert 'left.safety_filter:=warn' in arguments  # rclpy's logger name of the node
    (root,) = hardware_graph(certificate=certificate, urdf_path=urdf)
    assert not any(a.startswith('__ns:=') for a in root.ros_arguments(None))
    (topic,) = hardware_graph(certificate=certificate, robot_description_topic='robot_description',
                              limits_path=limits, namespace='/cell2/left')
    assert topic.parameters['robot_description_topic'] == 'robot_description'
    assert topic.parameters['urdf_path'] == ''
    with pytest.raises(InvalidValue, match='one of them'):
        hardware_graph(certificate=certificate, urdf_path=urdf,
                       robot_description_topic='robot_description')
    with pytest.raises(InvalidValue, match='not a ROS namespace'):
        hardware_graph(certificate=certificate, urdf_path=urdf, namespace='a b')
    specs = sim_demo_graph(urdf_path=urdf, limits_path=limits, certificate=certificate,
                           control_rate_hz=1000.0, bag_path=tmp_path / 'bag', namespace='/sim1')
    assert {s.namespace for s in specs} == {'/sim1'}
    (recorder,) = [s for s in specs if s.executable == 'bag_recorder']
    topics = recorder.parameters['topics']
    assert '/diagnostics' in topics and '/sim1/joint_states' in topics
    assert '/sim1/safety_filter/status' in topics
    assert recorder.parameters['latched_topics'] == ['/sim1/safety_filter/status_fields']
    assert len(recorder.parameters['types']) == len(topics)
