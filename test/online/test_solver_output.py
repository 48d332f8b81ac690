"""No solver text in what the commands print.

OSQP 1.x prints "Polishing not needed - no active set detected at optimal point" on every
solve whose answer has no active constraint, whatever its ``verbose`` setting (the filter
leaves the nominal alone on most steps, so that was most steps); ``safety_filter.online.qp_solver``
keeps it, and anything else OSQP writes through Python, off standard output. These tests
run the commands as subprocesses (the demo's ROS graph with the filter node in one process
and with one process per node, replay with its worker processes, certify with HiGHS,
stress) and look for solver text in everything they print: known phrases of OSQP and
HiGHS, and a pattern of solver vocabulary that our own output never uses.

The first test is the canary: with the silencing turned off, the same detector must find
OSQP's line in a subprocess that solves one unconstrained QP, which shows both that the
installed OSQP still prints it and that the checks below could fail.
"""

from __future__ import annotations

import io
import re
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from command_runs import REPO, CommandRun, certify_run, demo_run, replay_run, stress_run

from safety_filter.online import qp_solver as qp

# Phrases of OSQP 1.x (its polishing note, banner, summary and error prefix) and of HiGHS
# (its log as printed with output on).
SOLVER_PHRASES = (
    'Polishing not needed', 'no active set detected', 'Operator Splitting QP Solver',
    'OSQP Developer Team', 'solution polishing:', 'number of iterations:',
    'optimal objective:', 'ERROR in ', 'Running HiGHS', 'HiGHS run time', 'Presolving model',
    'Model status', 'Objective value', 'Coefficient ranges',
)
# Solver vocabulary: solver names, polishing, active sets, presolve, objectives, iteration
# counts, primal/dual residuals. Our commands' own output uses none of it (the tests below
# would say so if that changed).
SOLVER_PATTERN = re.compile(
    r'\b(osqp|highs|clarabel|qdldl|polish\w*|active set|presolv\w*|objective|simplex|'
    r'(primal|dual)\s+(res\w*|infeas\w*)|iter(ation)?s?\s*[:=])', re.IGNORECASE)

# One unconstrained solve (the nominal inside every bound: no active set), then a line of
# our own. ``quiet`` False replaces the silencing by a no-op first: OSQP as it is.
_PROBE = textwrap.dedent("""
    import sys
    import numpy as np
    import safety_filter.online.qp_solver as qp
    if not {quiet}:
        qp.silence_solver_output = lambda: None
    solver = qp.AccelerationQP(np.array([10.0, 10.0]))
    mass = np.array([[2.0, 0.1], [0.1, 1.0]])
    result = solver.solve(mass, np.zeros(2), np.array([0.5, 0.2]), np.full(2, -100.0),
                          np.full(2, 100.0))
    assert result.solved, result
    result = solver.solve(mass, np.zeros(2), np.array([50.0, 0.2]), np.full(2, -100.0),
                          np.full(2, 100.0))
    assert result.solved, result
    print('probe done', sys.stdout.isatty(), sys.stdout.fileno())
    sys.stdout.write('written directly\\n')
""")


def solver_lines(text: str) -> list[str]:
    """Lines of ``text`` with a known solver phrase or solver vocabulary."""
    return [line for line in text.splitlines()
            if any(p in line for p in SOLVER_PHRASES) or SOLVER_PATTERN.search(line)]


def _probe(quiet: bool) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, '-c', _PROBE.format(quiet=quiet)], cwd=REPO,
                          capture_output=True, text=True, timeout=120)


# ---------------------------------------------------------------------- the mechanism
def test_canary_osqp_prints_its_polishing_note_without_the_silencing() -> None:
    loud = _probe(quiet=False)
    assert loud.returncode == 0, loud.stderr
    if 'Polishing not needed' not in loud.stdout:
        pytest.skip('this OSQP prints nothing on an unconstrained solve: the checks in this '
                    'module cannot fail (good, but they no longer prove anything)')
    found = solver_lines(loud.stdout)
    assert found and all(SOLVER_PATTERN.search(line) for line in found), loud.stdout
    assert 'probe done' in loud.stdout


def test_the_qp_keeps_osqp_off_stdout_and_lets_everything_else_through() -> None:
    quiet = _probe(quiet=True)
    assert quiet.returncode == 0, quiet.stderr
    # Exactly our two lines: nothing of OSQP's, and the stand-in stream still answers
    # isatty() and fileno() like the real one.
    assert quiet.stdout == 'probe done False 1\nwritten directly\n', quiet.stdout
    assert quiet.stderr == ''


def test_the_stand_in_stream_is_installed_once_and_follows_a_replaced_stdout(
        monkeypatch: pytest.MonkeyPatch) -> None:
    captured = io.StringIO()
    monkeypatch.setattr(sys, 'stdout', captured)
    qp.silence_solver_output()
    first = sys.stdout
    assert first is not captured and first.getvalue() == ''  # attributes pass through
    qp.silence_solver_output()
    assert sys.stdout is first  # idempotent: no stand-in around a stand-in
    print('ours')
    assert captured.getvalue() == 'ours\n'
    # A stdout replaced later is wrapped again by the next QP built, not by the step.
    later = io.StringIO()
    monkeypatch.setattr(sys, 'stdout', later)
    solver = qp.AccelerationQP(np.array([10.0, 10.0]))
    assert sys.stdout is not later
    result = solver.solve(np.eye(2), np.zeros(2), np.array([0.5, 0.2]), np.full(2, -100.0),
                          np.full(2, 100.0))
    assert result.solved
    sys.stdout.write('after\n')
    assert later.getvalue() == 'after\n'


# ---------------------------------------------------------------------- the commands
def _printed(run: CommandRun) -> str:
    return '\n'.join([run.stdout, run.stderr, *(text for _, text in run.logs)])


def _assert_no_solver_text(run: CommandRun, expected: str) -> None:
    assert expected in run.stdout, f'{run.describe()} printed:\n{run.stdout}\n{run.stderr}'
    found = solver_lines(_printed(run))
    assert not found, f'{run.describe()} printed solver text:\n' + '\n'.join(found[:20])


@pytest.mark.slow
def test_certify_prints_no_solver_text() -> None:
    _assert_no_solver_text(certify_run(), 'verdict: CERTIFIED')


@pytest.mark.ros
@pytest.mark.slow
def test_the_demo_graph_prints_no_solver_text() -> None:
    run = demo_run()
    _assert_no_solver_text(run, 'filtered run: all 6 limits kept')


@pytest.mark.ros
@pytest.mark.slow
def test_the_demo_with_the_filter_node_in_its_own_process_prints_no_solver_text() -> None:
    run = demo_run(processes=True)
    names = [name for name, _ in run.logs]
    assert 'logs/filtered/safety_filter.log' in names, names  # the node's own output
    _assert_no_solver_text(run, 'filtered run: all 6 limits kept')


@pytest.mark.slow
def test_replay_prints_no_solver_text() -> None:
    _assert_no_solver_text(replay_run(), '2 of 2 bags replayed')


@pytest.mark.slow
def test_stress_prints_no_solver_text() -> None:
    _assert_no_solver_text(stress_run(), 'verdict: ')
