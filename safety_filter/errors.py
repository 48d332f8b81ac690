"""Exceptions raised by the package, and the exit codes of its commands.

Every error the package raises on purpose derives from :class:`SafetyFilterError`, so a
caller can catch the package's errors without catching programming errors. Subclasses are
named for the condition and carry the data a user needs to fix it (the joint, the value,
the bound, the file) as attributes, besides the message. Each class also says which exit
code a command returns when it ends on that error (:attr:`SafetyFilterError.exit_code`).

The tree::

    SafetyFilterError
    +-- InputError                   bad input from the user: exit 2
    |   +-- InvalidValue             a number, name or option outside what is allowed
    |   |   +-- ShapeMismatch        an array of the wrong length or shape
    |   |   +-- NonFiniteValue       NaN or infinity where a number is needed
    |   +-- RobotDescriptionError    a URDF that cannot be used
    |   |   +-- UnknownJoint, UnknownLink, UnsupportedChain, InvalidInertia
    |   +-- InvalidLimits            joint limits missing, inconsistent, or a bad limits file
    |   +-- FileFormatError          a file that is missing or not in the expected format
    |       +-- CertificateError     a certificate file
    |       |   +-- CertificateMismatch  a certificate computed for another model
    |       +-- BagError             a bag that cannot be read or written as asked
    |       +-- StatusLayoutError    status records that do not fit their field names
    |       +-- EventLogError        an event log that cannot be read or written
    |   +-- ClusterError             a Dask cluster that cannot be used (address, workers)
    +-- SolverError                  the QP solver cannot be set up: exit 1
    +-- RunFailed                    a run that could not do its job: exit 1
        +-- GraphError               a ROS graph that could not start or ran into trouble
"""

from __future__ import annotations

import enum
from collections.abc import Sequence
from pathlib import Path


class ExitCode(enum.IntEnum):
    """The exit codes of ``safety-filter`` and the package's node executables.

    One meaning per number across every command (docs and ``--help`` name the ones each
    command returns).
    """

    OK = 0
    FAILED = 1            # the command could not do its job (a node failed, no bag replayed)
    BAD_INPUT = 2         # bad options, files or robot description
    NOT_CERTIFIED = 3     # certification refused the design
    LIMIT_BROKEN = 4      # a filtered run broke a limit (the demo)
    STRESS_FAILED = 5     # the stress test found a violation or an unanswered push
    INCONCLUSIVE = 6      # the gravity check could not decide
    INTERRUPTED = 130     # Ctrl-C (128 + SIGINT, the shells' convention)


class SafetyFilterError(Exception):
    """Base class of every error the package raises on purpose."""

    exit_code: ExitCode = ExitCode.FAILED


# ----------------------------------------------------------------------------- input
class InputError(SafetyFilterError):
    """Bad input from the user: options, files, a robot description, states, settings."""

    exit_code = ExitCode.BAD_INPUT


class InvalidValue(InputError):
    """A value outside what is allowed.

    Attributes:
        what: what the value is (an option, a setting, a field), as the user knows it.
        value: the value given.
        expected: what is allowed, in words (``'> 0'``, ``'one of linear, sqrt'``).
        joint: the joint it belongs to, if any.
    """

    def __init__(self, what: str, value: object, expected: str = '',
                 joint: str | None = None, detail: str = '') -> None:
        self.what = what
        self.value = value
        self.expected = expected
        self.joint = joint
        where = f'joint {joint!r}: ' if joint else ''
        message = f'{where}{what}: {value!r}'
        if expected:
            message += f' (expected {expected})'
        if detail:
            message += f'; {detail}'
        super().__init__(message)


class ShapeMismatch(InvalidValue):
    """An array of the wrong length or shape.

    Attributes:
        what, value (the shape found), expected (the shape wanted, in words).
        expected_shape, found_shape: the shapes as tuples.
    """

    def __init__(self, what: str, expected_shape: Sequence[int] | int,
                 found_shape: Sequence[int] | int, detail: str = '') -> None:
        self.expected_shape = _as_shape(expected_shape)
        self.found_shape = _as_shape(found_shape)
        super().__init__(what, self.found_shape, f'shape {self.expected_shape}',
                         detail=detail)


class NonFiniteValue(InvalidValue):
    """NaN or infinity where a finite number is needed."""

    def __init__(self, what: str, value: object = float('nan'), joint: str | None = None,
                 detail: str = '') -> None:
        super().__init__(what, value, 'a finite number', joint=joint, detail=detail)


class RobotDescriptionError(InputError):
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


class InvalidLimits(InputError):
    """Joint limits that are missing or inconsistent, or a limits file that is malformed."""

    def __init__(self, message: str, joint: str | None = None) -> None:
        self.joint = joint
        super().__init__(message if joint is None else f'joint {joint!r}: {message}')


class FileFormatError(InputError):
    """A file that is missing, unreadable or not in the format expected.

    Attributes:
        path: the file (None when the data did not come from a file).
        reason: what is wrong with it.
    """

    def __init__(self, reason: str, path: str | Path | None = None) -> None:
        self.path = None if path is None else Path(path)
        self.reason = reason
        super().__init__(reason if path is None or str(path) in reason
                         else f'{path}: {reason}')


class CertificateError(FileFormatError):
    """A certificate file that is missing, malformed or inconsistent."""


class CertificateMismatch(CertificateError):
    """A certificate used with a robot model it was not computed for.

    Attributes:
        expected, found: the certificate's model hash and the model's.
        cause: what differs and what to do about it.
    """

    def __init__(self, expected: str, found: str, cause: str = '') -> None:
        self.expected = expected
        self.found = found
        self.cause = cause or ('the model differs from the one certified; certify this model '
                               'again')
        super().__init__(
            f'the certificate was computed for model hash {expected[:16]}..., but the model in '
            f'use has hash {found[:16]}...: {self.cause}')


class BagError(FileFormatError):
    """A bag that cannot be read, replayed or written as asked (missing, truncated, wrong
    topics or joints)."""


class StatusLayoutError(FileFormatError):
    """Status records whose field names are missing or do not fit the records."""


class EventLogError(FileFormatError):
    """An event log that cannot be read or written."""


class ClusterError(InputError):
    """The cluster cannot be used: no scheduler at the address, no workers, workers that run
    other versions or do not see the bags or the output folder, Dask not installed. Raised
    before any bag is replayed, so it is the user's setup to fix (exit 2); a worker lost
    half-way is reported on the bags it had, not raised."""


# ----------------------------------------------------------------------------- runs
class SolverError(SafetyFilterError):
    """The QP solver cannot be set up or answers in a way the filter cannot use."""


class RunFailed(SafetyFilterError):
    """A run that could not do its job."""


class GraphError(RunFailed):
    """A ROS graph that could not be started or ran into trouble."""


def _as_shape(shape: Sequence[int] | int) -> tuple[int, ...]:
    return (int(shape),) if isinstance(shape, (int,)) else tuple(int(n) for n in shape)
