"""The package's layers, read from its folders: imports point down, never in a cycle.

Walks every module of ``safety_filter`` (imports at any depth, including those inside
functions, which is where cycles used to hide) and checks the rules DEVELOPERS.md draws:

* a module imports only from its own subpackage or from a layer below it;
* only ``safety_filter/ros/`` imports rclpy or ROS message packages;
* the module graph has no cycle;
* a module over 500 lines says at the top why it is not split (``Kept in one module:``).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / 'safety_filter'

# Lowest first. A subpackage may import from itself and from any layer before it.
LAYERS = (
    ('errors', '_version', 'safety_notice'),
    ('core',),
    ('online',),
    ('certification',),
    ('simulation',),
    ('recordings',),
    ('replay',),
    ('reports',),
    ('campaigns',),
    ('monitor',),
    ('ros',),
    ('cli',),
)
RANK = {name: rank for rank, names in enumerate(LAYERS) for name in names}
ROS_PACKAGES = {'rclpy', 'sensor_msgs', 'std_msgs', 'diagnostic_msgs', 'std_srvs',
                'lifecycle_msgs', 'rcl_interfaces', 'builtin_interfaces', 'rosidl_runtime_py'}
LONG_MODULE_LINES = 500
LONG_MODULE_REASON = 'Kept in one module:'


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix('').parts
    return '.'.join(parts[:-1] if parts[-1] == '__init__' else parts)


def _modules() -> dict[str, Path]:
    return {_module_name(path): path for path in sorted(PACKAGE.rglob('*.py'))}


def _imports(path: Path, module: str) -> set[str]:
    """Every module named by an import anywhere in the file, made absolute."""
    tree = ast.parse(path.read_text(encoding='utf-8'))
    package = module if path.name == '__init__.py' else module.rpartition('.')[0]
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ''
            if node.level:
                anchor = package.split('.')
                anchor = anchor[:len(anchor) - (node.level - 1)]
                base = '.'.join(anchor + ([base] if base else []))
            found.add(base)
            # ``from safety_filter.x import y`` may name the module ``x.y``.
            found.update(f'{base}.{alias.name}' for alias in node.names)
    return found


def _internal_edges() -> dict[str, set[str]]:
    modules = _modules()
    edges: dict[str, set[str]] = {}
    for name, path in modules.items():
        edges[name] = {target for target in _imports(path, name)
                       if target in modules and target != name}
    return edges


def _layer(module: str) -> str:
    parts = module.split('.')
    return parts[1] if len(parts) > 1 else ''


def test_every_module_sits_in_a_known_layer() -> None:
    unknown = sorted({_layer(name) for name in _modules()} - set(RANK) - {''})
    assert not unknown, f'modules outside the layers of DEVELOPERS.md: {unknown}'


def test_imports_point_down() -> None:
    upward = []
    for module, targets in _internal_edges().items():
        layer = _layer(module)
        if not layer:  # the package root: the lazy public API, allowed to name any layer
            continue
        for target in targets:
            target_layer = _layer(target)
            if not target_layer or target_layer == layer:
                continue
            if RANK[target_layer] > RANK[layer]:
                upward.append(f'{module} -> {target}')
    assert not upward, 'imports that point up a layer:\n' + '\n'.join(sorted(upward))


def test_only_the_ros_layer_imports_ros() -> None:
    offenders = []
    for module, path in _modules().items():
        if _layer(module) == 'ros':
            continue
        roots = {name.split('.')[0] for name in _imports(path, module)}
        if roots & ROS_PACKAGES:
            offenders.append(f'{module}: {sorted(roots & ROS_PACKAGES)}')
    assert not offenders, 'ROS imported outside safety_filter/ros:\n' + '\n'.join(offenders)


def _cycles(edges: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    components: list[list[str]] = []

    def visit(node: str) -> None:
        index[node] = low[node] = len(index)
        stack.append(node)
        on_stack.add(node)
        for target in edges.get(node, ()):
            if target not in index:
                visit(target)
                low[node] = min(low[node], low[target])
            elif target in on_stack:
                low[node] = min(low[node], index[target])
        if low[node] == index[node]:
            component = []
            while True:
                member = stack.pop()
                on_stack.discard(member)
                component.append(member)
                if member == node:
                    break
            if len(component) > 1:
                components.append(sorted(component))

    for node in sorted(edges):
        if node not in index:
            visit(node)
    return components


def test_the_cycle_finder_finds_a_cycle() -> None:
    assert _cycles({'a': {'b'}, 'b': {'c'}, 'c': {'a'}, 'd': {'a'}}) == [['a', 'b', 'c']]
    assert _cycles({'a': {'b'}, 'b': set()}) == []


def test_no_import_cycle() -> None:
    # A package's __init__ is imported by its modules implicitly; only explicit edges count.
    edges = {module: {t for t in targets if t != 'safety_filter'}
             for module, targets in _internal_edges().items() if module != 'safety_filter'}
    cycles = _cycles(edges)
    assert not cycles, 'import cycles:\n' + '\n'.join(' <-> '.join(c) for c in cycles)


@pytest.mark.parametrize('module', sorted(_modules()))
def test_a_long_module_says_why_it_is_one(module: str) -> None:
    path = _modules()[module]
    text = path.read_text(encoding='utf-8')
    if text.count('\n') <= LONG_MODULE_LINES:
        return
    docstring = ast.get_docstring(ast.parse(text)) or ''
    assert LONG_MODULE_REASON in docstring, (
        f'{path.relative_to(PACKAGE.parent)} has {text.count(chr(10))} lines: split it, or '
        f'say why not in its docstring ("{LONG_MODULE_REASON} ...")')
