"""The demo arms shipped with the package (invented arms of our own, for demos and tests).

Light to import (the command line offers :data:`DEMO_ARMS` as choices): the robot model is
loaded by :func:`load_demo_arm` when it is called.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING

from safety_filter.errors import InvalidValue

if TYPE_CHECKING:
    from safety_filter.core.robot_model import RobotModel

DEMO_ARMS = ('planar2', 'bench6', 'reach7')


def demo_arm_files(name: str) -> tuple[Path, Path]:
    """Paths of the URDF and the limits file of a demo arm.

    Raises:
        InvalidValue: not the name of a demo arm.
    """
    if name not in DEMO_ARMS:
        raise InvalidValue('demo arm', name, f'one of {", ".join(DEMO_ARMS)}')
    folder = Path(str(resources.files('safety_filter') / 'robots'))
    return folder / f'{name}.urdf', folder / f'{name}_limits.yaml'


def load_demo_arm(name: str) -> RobotModel:
    """The :class:`RobotModel` of a demo arm, with its limits file applied."""
    from safety_filter.core.robot_model import RobotModel

    urdf, limits = demo_arm_files(name)
    return RobotModel.from_urdf(urdf, limits=limits)
