"""Packaging for the safety_filter ROS 2 package (ament_python)."""

from glob import glob

from setuptools import find_packages, setup

PACKAGE_NAME = 'safety_filter'
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
        PACKAGE_NAME: ['robots/*.urdf', 'robots/*.yaml', 'py.typed'],
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
        # Compiles the filter step's inner loops (safety_filter/_kernels.py).
        'numba>=0.57',
        # Lays out and draws the live monitor's screen (safety_filter/monitor_screen.py).
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
        # Test tooling and the reference implementations the tests compare against.
        'test': ['pytest>=7', 'highspy>=1.5', 'cvxpy>=1.4', 'ruff'],
    },
    zip_safe=False,
    entry_points={
        'console_scripts': [
            'safety-filter = safety_filter.cli:main',
            # `ros2 run safety_filter filter_node --ros-args --params-file certificate.yaml ...`
            'filter_node = safety_filter.ros.filter_node:main',
            # The simulated demo's nodes (launch/sim_demo.launch.py, `safety-filter demo`).
            'sim_arm = safety_filter.ros.sim_arm_node:main',
            'careless_operator = safety_filter.ros.operator_node:main',
            'bag_recorder = safety_filter.ros.recorder_node:main',
            # The live terminal monitor and event log (`safety-filter monitor`).
            'filter_monitor = safety_filter.ros.monitor:main',
        ],
    },
)
