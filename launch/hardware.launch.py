"""The safety filter alone, between a command source and the driver of a real arm.

    ros2 launch safety_filter hardware.launch.py certificate:=arm_certificate.yaml \
        urdf_path:=arm.urdf limits_path:=arm_limits.yaml \
        command_topic:=/effort_controller/commands payload_mass:=0.5

    ros2 launch safety_filter hardware.launch.py namespace:=/left \
        certificate:=left_certificate.yaml robot_description_topic:=robot_description \
        limits_path:=left_limits.yaml command_topic:=effort_controller/commands

The filter reads ``joint_states_topic`` and ``nominal_topic`` and publishes the safe torque
on ``command_topic`` (its ``filtered_torque``, remapped). Operational parameters come from
``config/filter.yaml`` (one filter step per joint state, timeouts, diagnostics).

Arguments:
    certificate: the certificate parameter file (``safety-filter certify``); required. Its
        key (``/**``) applies it to the filter in any namespace.
    urdf_path, limits_path: the robot the certificate was computed for (hash-checked);
        ``urdf_path`` a URDF, or a ``.xacro`` file when the ``xacro`` package is installed.
    robot_description_topic: instead of ``urdf_path``: read the URDF from this topic
        (``std_msgs/String``, transient-local, as ``robot_state_publisher`` publishes
        ``robot_description``; a relative name resolves in the namespace). Give one of the
        two.
    namespace: the filter's namespace (default: the root), e.g. ``/left`` for one of two
        arms: its relative topics (joint states, nominal, commands unless given absolute),
        ``~/status`` and lifecycle services resolve in it, and its diagnostics are named
        ``'/left/safety_filter: filter'``.
    command_topic: the driver's effort-command topic (default ``effort_command``).
    joint_states_topic: the driver's joint states (default ``joint_states``).
    nominal_topic: the command source's torques (default ``nominal_torque``).
    gravity_convention: ``full`` (the driver takes full torques, default) or
        ``driver_compensated`` (the driver adds gravity itself).
    payload_mass: the mounted payload [kg] (default -1: the middle of the certified range).
    watchdog_rate_hz: the filter's watchdog rate [Hz] (parameter ``watchdog_rate_hz``,
        ``--watchdog-rate`` of ``safety-filter run-graph``; default 0: the certificate's
        control rate). It is not the control rate: that is the certificate's, and the driver
        must run at it for the certificate's guarantee.
    activate_at_start: ``true`` activates the filter at start, so that it commands the driver
        as soon as joint states arrive. Default ``false``: the filter is configured at start
        (errors in the certificate or the robot show at once) and stays INACTIVE, publishing
        no torque, until ``ros2 lifecycle set /<namespace>/safety_filter activate`` (or a
        lifecycle manager) activates it.

``safety-filter run-graph --graph hardware`` starts the same node without ``ros2 launch``.
"""

from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument
from launch.conditions import IfCondition, UnlessCondition
from launch.substitutions import LaunchConfiguration, PathJoinSubstitution
from launch_ros.actions import Node
from launch_ros.parameter_descriptions import ParameterValue
from launch_ros.substitutions import FindPackageShare


def generate_launch_description() -> LaunchDescription:
    config = PathJoinSubstitution([FindPackageShare('safety_filter'), 'config', 'filter.yaml'])
    arguments = [
        DeclareLaunchArgument('certificate',
                              description='certificate parameter file (safety-filter certify)'),
        DeclareLaunchArgument('urdf_path', default_value='',
                              description='the robot URDF or .xacro file (or give '
                              'robot_description_topic)'),
        DeclareLaunchArgument('robot_description_topic', default_value='',
                              description='read the URDF from this std_msgs/String topic '
                              '(transient-local, as robot_state_publisher publishes it) '
                              'instead of urdf_path'),
        DeclareLaunchArgument('namespace', default_value='',
                              description="the filter's ROS namespace (default: the root)"),
        DeclareLaunchArgument('limits_path', default_value='',
                              description='the limits file of the robot'),
        DeclareLaunchArgument('command_topic', default_value='effort_command',
                              description="the driver's effort-command topic"),
        DeclareLaunchArgument('joint_states_topic', default_value='joint_states',
                              description="the driver's joint states"),
        DeclareLaunchArgument('nominal_topic', default_value='nominal_torque',
                              description="the command source's torques"),
        DeclareLaunchArgument('gravity_convention', default_value='full',
                              description='full or driver_compensated'),
        DeclareLaunchArgument('payload_mass', default_value='-1.0',
                              description='mounted payload [kg]; negative: mid-range'),
        DeclareLaunchArgument('watchdog_rate_hz', default_value='0.0',
                              description="the filter's watchdog rate [Hz]; 0: the "
                              "certificate's control rate"),
        DeclareLaunchArgument('activate_at_start', default_value='false',
                              description='true: activate the filter at start; false '
                              '(default): configured and inactive until `ros2 lifecycle set '
                              '/<namespace>/safety_filter activate`'),
    ]
    parameters = [
        LaunchConfiguration('certificate'), config,
        {'urdf_path': LaunchConfiguration('urdf_path'),
         'robot_description_topic': LaunchConfiguration('robot_description_topic'),
         'limits_path': LaunchConfiguration('limits_path'),
         'gravity_convention': LaunchConfiguration('gravity_convention'),
         'payload_mass': ParameterValue(LaunchConfiguration('payload_mass'), value_type=float),
         'watchdog_rate_hz': ParameterValue(LaunchConfiguration('watchdog_rate_hz'),
                                            value_type=float)},
    ]
    remappings = [
        ('filtered_torque', LaunchConfiguration('command_topic')),
        ('joint_states', LaunchConfiguration('joint_states_topic')),
        ('nominal_torque', LaunchConfiguration('nominal_topic')),
    ]
    activated = Node(
        package='safety_filter', executable='filter_node', name='safety_filter',
        namespace=LaunchConfiguration('namespace'),
        output='screen', arguments=['--autostart'], parameters=parameters,
        remappings=remappings, condition=IfCondition(LaunchConfiguration('activate_at_start')))
    inactive = Node(
        package='safety_filter', executable='filter_node', name='safety_filter',
        namespace=LaunchConfiguration('namespace'),
        output='screen', arguments=['--configure-at-start'], parameters=parameters,
        remappings=remappings,
        condition=UnlessCondition(LaunchConfiguration('activate_at_start')))
    return LaunchDescription(arguments + [activated, inactive])
