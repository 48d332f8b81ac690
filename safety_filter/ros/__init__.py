"""ROS 2 adapters of the safety filter (need rclpy; the numeric core does not).

* :mod:`safety_filter.ros.filter_node`: the managed (lifecycle) node ``safety_filter`` that sits
  between a teleoperation or policy node and the hardware driver.

Importing this package imports nothing from ROS; the node module does.
"""
