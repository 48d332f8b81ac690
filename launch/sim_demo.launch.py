"""The simulated demo: a simulated arm, a careless operator and the safety filter.

    ros2 launch safety_filter sim_demo.launch.py certificate:=out/demo/bench6_certificate.yaml

Nodes: ``sim_arm`` (the simulated arm and its driver: takes ``sim_effort_command``, publishes
``joint_states`` and ``/clock``), ``careless_operator`` (publishes ``nominal_torque``) and
``safety_filter`` (the lifecycle filter node, configured and activated at start with
``--autostart``), whose ``filtered_torque`` is remapped to the arm's ``sim_effort_command``
(not ``effort_command``, the hardware launch file's default command topic).

The graph runs on its own ROS domain (``domain_id``: by default a random one in 150..199,
printed at start) with discovery limited to this machine (``ROS_AUTOMATIC_DISCOVERY_RANGE``
``LOCALHOST``), like ``safety-filter demo``: its nodes cannot reach a real robot's nodes, nor
be reached by them.
Parameters come from ``config/sim_demo.yaml`` (installed to the package's share folder) and,
for the filter, from the certificate.

Arguments:
    certificate: the certificate parameter file for the arm (default
        ``out/demo/bench6_certificate.yaml``, relative to the current folder: where
        ``safety-filter demo`` writes it; ``safety-filter certify --demo bench6 --output ...``
        writes one anywhere).
    urdf_path, limits_path: the robot (default: the bench6 demo arm shipped in the package).
    seed: the operator's seed (default 0).
    domain_id: the graph's ROS domain (default: a random one in 150..199).
    namespace: the namespace of every node of the graph (default: the root); their topics
        resolve in it (``/clock`` and ``/diagnostics`` stay global).

``safety-filter run-graph`` starts the same graph without ``ros2 launch``.
"""

import random

from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument, LogInfo, SetEnvironmentVariable
from launch.substitutions import LaunchConfiguration, PathJoinSubstitution
from launch_ros.actions import Node
from launch_ros.parameter_descriptions import ParameterValue
from launch_ros.substitutions import FindPackageShare

from safety_filter.simulation.demo_arms import demo_arm_files


def generate_launch_description() -> LaunchDescription:
    urdf, limits = demo_arm_files('bench6')
    config = PathJoinSubstitution([FindPackageShare('safety_filter'), 'config', 'sim_demo.yaml'])
    arguments = [
        DeclareLaunchArgument(
            'certificate', default_value='out/demo/bench6_certificate.yaml',
            description='certificate parameter file (safety-filter certify or demo)'),
        DeclareLaunchArgument('urdf_path', default_value=str(urdf),
                              description='the robot URDF'),
        DeclareLaunchArgument('limits_path', default_value=str(limits),
                              description='the limits file of the robot'),
        DeclareLaunchArgument('seed', default_value='0', description="the operator's seed"),
        DeclareLaunchArgument('domain_id', default_value=str(random.SystemRandom().randint(
            150, 199)), description='ROS domain of the graph (default: a random one in '
            '150..199, discovery on this machine only)'),
        DeclareLaunchArgument('namespace', default_value='',
                              description="the graph's ROS namespace (default: the root)"),
    ]
    # Set before the nodes start (the middleware reads both when a process starts).
    isolation = [
        SetEnvironmentVariable('ROS_DOMAIN_ID', LaunchConfiguration('domain_id')),
        SetEnvironmentVariable('ROS_AUTOMATIC_DISCOVERY_RANGE', 'LOCALHOST'),
        LogInfo(msg=['sim demo graph on ROS domain ', LaunchConfiguration('domain_id'),
                     ', discovery on this machine only']),
    ]
    robot = {'urdf_path': LaunchConfiguration('urdf_path'),
             'limits_path': LaunchConfiguration('limits_path')}
    namespace = LaunchConfiguration('namespace')
    sim_arm = Node(
        package='safety_filter', executable='sim_arm', name='sim_arm', namespace=namespace,
        output='screen', parameters=[config, robot])
    operator = Node(
        package='safety_filter', executable='careless_operator', name='careless_operator',
        namespace=namespace, output='screen',
        parameters=[config, robot,
                    {'seed': ParameterValue(LaunchConfiguration('seed'), value_type=int)}])
    safety_filter = Node(
        package='safety_filter', executable='filter_node', name='safety_filter',
        namespace=namespace, output='screen', arguments=['--autostart'],
        parameters=[LaunchConfiguration('certificate'), config, robot],
        remappings=[('filtered_torque', 'sim_effort_command')])
    return LaunchDescription(arguments + isolation + [sim_arm, operator, safety_filter])
