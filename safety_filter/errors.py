"""Exceptions raised by the package.

Every error the package raises on purpose derives from :class:`SafetyFilterError`, so a
caller can catch the package's errors without catching programming errors. Subclasses are
named for the condition and carry the data a user needs to fix it.
"""

from __future__ import annotations


class SafetyFilterError(Exception):
    """Base class of every error the package raises on purpose."""


class RobotDescriptionError(SafetyFilterError):
    """The URDF cannot be used: it does not parse, or it describes something unsupported."""


class UnknownJoint(RobotDescriptionError):
    """A joint name that the robot description does not contain."""

    def __init__(self, joint: str, known: list[str] | tuple[str, ...]) -> None:
        self.joint = joint
        self.known = tuple(known)
        super().__init__(
            f'unknown joint {joint!r}; the robot description has: {", ".join(self.known)}')


class UnknownLink(RobotDescriptionError):
    """A link name that the robot description does not contain."""

    def __init__(self, link: str, known: list[str] | tuple[str, ...]) -> None:
        self.link = link
        self.known = tuple(known)
        super().__init__(
            f'unknown link {link!r}; the robot description has: {", ".join(self.known)}')


class UnsupportedChain(RobotDescriptionError):
    """The selected joints do not form a serial chain of supported joints."""


class InvalidInertia(RobotDescriptionError):
    """A link's inertial data is missing or not physical."""

    def __init__(self, link: str, reason: str) -> None:
        self.link = link
        self.reason = reason
        super().__init__(f'link {link!r}: {reason}')


class InvalidLimits(SafetyFilterError):
    """Joint limits that are missing or inconsistent, or a limits file that is malformed."""

    def __init__(self, message: str, joint: str | None = None) -> None:
        self.joint = joint
        super().__init__(message if joint is None else f'joint {joint!r}: {message}')
