"""Packaging for the safety_filter ROS 2 package (ament_python).

Console scripts go to ``<prefix>/lib/safety_filter`` when setup.cfg's ``install_scripts`` /
``script_dir`` apply (a colcon build), where ``ros2 run safety_filter <executable>`` finds
them; but that folder is not on ``PATH``, and the README's commands call ``safety-filter``.
So such an install also puts a copy of ``safety-filter`` (only that one: the node
executables have generic names) in ``<prefix>/bin``, which a sourced ``install/setup.bash``
puts on ``PATH`` (colcon adds a package's ``bin`` to ``PATH`` when it holds files). pip
installs (wheels, editable) put every console script in ``<prefix>/bin`` already and are
left alone.
"""

import os
import shutil
from glob import glob

from setuptools import find_packages, setup
from setuptools.command.develop import develop
from setuptools.command.install_scripts import install_scripts

PACKAGE_NAME = 'safety_filter'
# Console scripts that must be on PATH as well as in lib/<package> (see the docstring).
PATH_SCRIPTS = ('safety-filter',)


def _copy_to_bin(script_dir):
    """Copy PATH_SCRIPTS from ``<base>/lib/safety_filter`` to ``<base>/bin``; the copies."""
    script_dir = os.path.abspath(script_dir)
    lib = os.path.dirname(script_dir)
    if os.path.basename(script_dir) != PACKAGE_NAME or os.path.basename(lib) != 'lib':
        return []  # the scripts went elsewhere (a bin folder already): nothing to add
    bin_dir = os.path.join(os.path.dirname(lib), 'bin')
    copies = []
    for name in PATH_SCRIPTS:
        source = os.path.join(script_dir, name)
        if os.path.isfile(source):
            os.makedirs(bin_dir, exist_ok=True)
            target = os.path.join(bin_dir, name)
            shutil.copy2(source, target)  # keeps the interpreter line and the mode
            copies.append(target)
    return copies


class InstallScripts(install_scripts):
    """``setup.py install`` (colcon): the console scripts, then the PATH copies."""

    def run(self):
        super().run()
        if not getattr(self, 'no_ep', False):  # wheels: pip writes the scripts itself
            self.outfiles.extend(_copy_to_bin(self.install_dir))  # recorded: uninstallable


class Develop(develop):
    """``setup.py develop`` (colcon --symlink-install): the wrappers, then the PATH copies."""

    def install_wrapper_scripts(self, dist):
        result = super().install_wrapper_scripts(dist)
        _copy_to_bin(self.script_dir)
        return result

DESCRIPTION = 'A certified control-barrier-function safety filter for torque-controlled arms.'

setup(
    name=PACKAGE_NAME,
    # Keep in step with <version> in package.xml.
    version='0.1.0',
    description=DESCRIPTION,
    maintainer='Safety Filter Maintainers',
    maintainer_email='maintainers@safety-filter.invalid',
    license='Apache-2.0',
    packages=find_packages(exclude=['test']),
    package_data={
        PACKAGE_NAME: ['robots/*.urdf', 'robots/*.yaml', 'py.typed',
                       # Inlined into the HTML reports (uPlot: MIT licence).
                       'reports/report_assets/*.js', 'reports/report_assets/uplot/*'],
    },
    data_files=[
        ('share/ament_index/resource_index/packages', ['resource/' + PACKAGE_NAME]),
        ('share/' + PACKAGE_NAME, ['package.xml']),
        ('share/' + PACKAGE_NAME + '/launch', glob('launch/*.launch.py')),
        ('share/' + PACKAGE_NAME + '/config', glob('config/*.yaml')),
    ],
    python_requires='>=3.10',
    install_requires=[
        'numpy>=1.24',
        'scipy>=1.10',
        'osqp>=0.6.3',
        'pyyaml>=6',
        'urdf-parser-py>=0.0.4',
        'matplotlib>=3.7',
        'tqdm>=4.60',
        'rosbags>=0.9.20',
        # Rigid-body dynamics backend for the per-step path (the numpy recursion stays as
        # the reference and fallback).
        'pin>=2.7',
        # Compiles the filter step's inner loops (safety_filter/online/kernels.py).
        'numba>=0.57',
        # Lays out and draws the live monitor's screen (safety_filter/monitor/screen.py).
        'rich>=13',
    ],
    extras_require={
        # ROS 2 Jazzy client libraries as wheels (published for CPython 3.11 only);
        # not needed when the package is built inside a sourced ROS 2 install.
        'ros': [
            'ros-jazzy-rclpy',
            'ros-jazzy-sensor-msgs',
            'ros-jazzy-std-msgs',
            'ros-jazzy-diagnostic-msgs',
            'ros-jazzy-std-srvs',
            'ros-jazzy-lifecycle-msgs',
            'ros-jazzy-rcl-interfaces',
            'ros-jazzy-rmw-fastrtps-cpp',
        ],
        # Expands .xacro robot descriptions given as --urdf / urdf_path.
        'xacro': ['xacro>=2'],
        # `safety-filter replay --cluster`: bags replayed on a Dask cluster's workers.
        'cluster': ['distributed>=2024.1.1'],
        # Test tooling and the reference implementations the tests compare against (and
        # Dask distributed, for the cluster replay's tests).
        # websocket-client drives Debian's Chromium in the report page tests.
        'test': ['pytest>=7', 'highspy>=1.5', 'cvxpy>=1.4', 'ruff', 'xacro>=2',
                 'distributed>=2024.1.1', 'websocket-client>=1.6'],
    },
    zip_safe=False,
    cmdclass={'install_scripts': InstallScripts, 'develop': Develop},
    entry_points={
        'console_scripts': [
            'safety-filter = safety_filter.cli.main:main',
            # `ros2 run safety_filter filter_node --ros-args --params-file certificate.yaml ...`
            'filter_node = safety_filter.ros.filter_node:main',
            # The simulated demo's nodes (launch/sim_demo.launch.py, `safety-filter demo`).
            'sim_arm = safety_filter.ros.sim_arm_node:main',
            'careless_operator = safety_filter.ros.operator_node:main',
            'bag_recorder = safety_filter.ros.recorder_node:main',
            # The live terminal monitor and event log (`safety-filter monitor`).
            'filter_monitor = safety_filter.cli.monitor:filter_monitor_main',
        ],
    },
)
