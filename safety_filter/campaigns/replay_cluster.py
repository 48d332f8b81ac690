"""Replay bags on the workers of a running Dask cluster (``safety-filter replay --cluster``).

The machine that starts the run (the client) finds the bags, as a local run does, and hands
each bag to the cluster's scheduler as one task; a worker runs
:func:`safety_filter.campaigns.replay_job.replay_bag` on it and writes the bag's report into the
output folder itself. What travels over the network is small: the robot model, the
certificates, the options and the event log (pickled once per run, a few kB) and, per
bag, its absolute path and the absolute output folder. The bags are never copied: every
worker must see the bags and the output folder at the same absolute paths as the client
(a shared file system). The reports record the paths as the client spells them, so the
output is the same as a local run's (``docs/replay.md``).

Before any bag is replayed, :func:`replay_on_cluster` checks that the address is a Dask
scheduler that answers, that it has workers, that each worker runs the same versions of
this package and of the libraries that shape its numbers and figures, sees every bag and
can write into the output folder; otherwise it raises :class:`ClusterError` and nothing is
replayed. During the run, a bag whose worker dies is started again on another worker by
the scheduler (up to its ``distributed.scheduler.allowed-failures``, 3 by default); a bag
the cluster gives up on, or whose report does not appear in the output folder on the
client, is listed as failed with the reason, and every other bag's result is kept.

Only this module imports ``distributed``; it is imported when a cluster is asked for.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import hashlib
import os
import pickle
import platform
import socket
import sys
import threading
import uuid
from collections.abc import Sequence
from importlib import metadata
from pathlib import Path
from typing import Any

from safety_filter.campaigns.replay_job import (
    CertificateChoice,
    ReplayOptions,
    failed_entry,
    replay_bag,
)
from safety_filter.core.robot_model import RobotModel
from safety_filter.errors import ClusterError, ShapeMismatch
from safety_filter.recordings.event_log import EventLog

# How long to wait for the scheduler to answer, and for a first worker [s].
CONNECT_TIMEOUT_S = 10.0
# Libraries whose version changes the replay's numbers, its bags or its figures; a worker
# must run the versions the client runs (with this package's own version, and Python's).
PINNED_DISTRIBUTIONS = ('numpy', 'scipy', 'osqp', 'pin', 'numba', 'matplotlib', 'rosbags')
INSTALL_HINT = ("python3 -m pip install 'distributed>=2024.1.1' (or the package's extra: "
                "python3 -m pip install '.[cluster]' in a clone)")
_MISSING_SHOWN = 3  # paths named in an error about missing bags (then a count)


def _import_distributed() -> Any:
    try:
        import distributed
    except ImportError as err:
        raise ClusterError(f'replaying on a cluster needs Dask distributed, which is not '
                           f'installed ({err}): {INSTALL_HINT}') from err
    return distributed


def parse_address(address: str) -> tuple[str, str, int]:
    """``(address, host, port)`` of a scheduler address ``tcp://HOST:PORT`` or ``HOST:PORT``.

    Raises:
        ClusterError: another scheme, or no host or port.
    """
    text = address.strip()
    scheme, sep, rest = text.partition('://')
    if not sep:
        scheme, rest = 'tcp', text
    if scheme != 'tcp':
        raise ClusterError(f'cluster address {address!r}: only tcp://HOST:PORT addresses of a '
                           'Dask scheduler are supported')
    host, sep, port = rest.rpartition(':')
    host = host.strip('[]')  # an IPv6 literal: [::1]:8786
    if not sep or not host or not port.isdigit() or not 0 < int(port) < 65536:
        raise ClusterError(f'cluster address {address!r} is not tcp://HOST:PORT (e.g. '
                           'tcp://10.0.0.5:8786, the address the scheduler prints)')
    return f'tcp://{rest}', host, int(port)


def _run_coroutine(coroutine: Any, timeout_s: float) -> Any:
    """Run ``coroutine`` to its end on an event loop of its own thread (the caller may
    already run a loop, as in a notebook), giving up after ``timeout_s``."""
    with concurrent.futures.ThreadPoolExecutor(1) as pool:
        return pool.submit(asyncio.run, asyncio.wait_for(coroutine, timeout_s)).result()


def _identify(address: str, timeout_s: float) -> dict[str, Any]:
    """Ask the server at ``address`` who it is (Dask's ``identity`` request)."""
    from distributed.comm import connect

    async def ask() -> dict[str, Any]:
        comm = await connect(address, timeout=timeout_s)
        try:
            await comm.write({'op': 'identity', 'reply': True})
            return await comm.read()
        finally:
            await comm.close()

    return _run_coroutine(ask(), timeout_s)


def _check_scheduler(address: str, host: str, port: int, timeout_s: float) -> None:
    """Fail fast and clearly on an address where no Dask scheduler answers.

    Dask's own client retries a refused connection until its timeout and can wait without
    end on a server that accepts but does not speak its protocol; a plain TCP connection
    and one ``identity`` request with a deadline tell these cases apart first.
    """
    try:
        with socket.create_connection((host, port), timeout=timeout_s):
            pass
    except OSError as err:
        reason = 'timed out' if isinstance(err, TimeoutError) else (err.strerror or str(err))
        raise ClusterError(f'cannot reach the cluster scheduler at {address}: {reason}') \
            from err
    try:
        identity = _identify(address, timeout_s)
    except (TimeoutError, asyncio.TimeoutError) as err:
        raise ClusterError(f'no Dask scheduler answered at {address} within {timeout_s:g} s '
                           '(is it the address the scheduler printed?)') from err
    except Exception as err:
        raise ClusterError(f'no Dask scheduler answered at {address}: '
                           f'{type(err).__name__}: {err}') from err
    kind = identity.get('type') if isinstance(identity, dict) else None
    if kind != 'Scheduler':
        what = f'a Dask {kind.lower()}' if isinstance(kind, str) else 'not a Dask scheduler'
        raise ClusterError(f'{address} is {what}; give the address of the scheduler')


def environment() -> dict[str, str | None]:
    """The versions a worker must share with the client: Python (major.minor), this
    package and :data:`PINNED_DISTRIBUTIONS` (None: not installed)."""
    import safety_filter

    versions: dict[str, str | None] = {
        'python': '.'.join(platform.python_version_tuple()[:2]),
        'safety_filter': safety_filter.__version__}
    for name in PINNED_DISTRIBUTIONS:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = None
    return versions


def inspect_worker(out_dir: str, marker: str, token: str, bags: Sequence[str]
                   ) -> dict[str, Any]:
    """What a worker sees (run on each worker before the replay; never raises).

    Returns ``environment`` (:func:`environment`), ``sees_output`` (the client's marker file
    ``marker`` in ``out_dir`` holds ``token``: the same folder, not one of the same name),
    ``writes_output`` (a file can be created there), ``missing`` (the bags it cannot see)
    and ``error`` (what went wrong checking, or None).
    """
    report: dict[str, Any] = {'environment': None, 'sees_output': False,
                              'writes_output': False, 'missing': [], 'error': None}
    try:
        report['environment'] = environment()
        try:
            report['sees_output'] = (Path(out_dir) / marker).read_text(
                encoding='utf-8') == token
        except OSError:
            report['sees_output'] = False
        probe = Path(out_dir) / f'{marker}.{os.getpid()}.{uuid.uuid4().hex}'
        try:
            probe.write_text('', encoding='utf-8')
            probe.unlink()
            report['writes_output'] = True
        except OSError:
            report['writes_output'] = False
        report['missing'] = [bag for bag in bags if not os.path.exists(bag)]
    except Exception as err:  # reported to the client, which refuses the cluster
        report['error'] = f'{type(err).__name__}: {err}'
    return report


def _check_workers(client: Any, out_dir: Path, bags: Sequence[str], timeout_s: float,
                   address: str) -> int:
    """Refuse a cluster whose workers cannot give a local run's result; returns how many
    workers were checked."""
    try:
        client.wait_for_workers(1, timeout=timeout_s)
    except Exception as err:
        raise ClusterError(f'the cluster at {address} has no workers (waited '
                           f'{timeout_s:g} s)') from err
    marker = f'.safety_filter_cluster_check_{uuid.uuid4().hex}'
    token = uuid.uuid4().hex
    marker_path = out_dir / marker
    try:
        marker_path.write_text(token, encoding='utf-8')
    except OSError as err:
        raise ClusterError(f'cannot write into the output folder {out_dir}: {err}') from err
    try:
        reports = client.run(inspect_worker, str(out_dir), marker, token, list(bags))
    except Exception as err:  # e.g. a worker without this package cannot unpickle the call
        raise ClusterError(f'the workers of {address} cannot run the replay: '
                           f'{type(err).__name__}: {err} (install this package, the same '
                           'version, on every worker)') from err
    finally:
        marker_path.unlink(missing_ok=True)
    here = environment()
    problems = []
    for worker, report in sorted(reports.items()):
        if report['error'] is not None:
            problems.append(f'{worker}: checking failed: {report["error"]}')
            continue
        theirs = report['environment'] or {}
        differ = [f'{name} {theirs.get(name)} (here {version})'
                  for name, version in here.items() if theirs.get(name) != version]
        if differ:
            problems.append(f'{worker}: other versions than this machine: '
                            + ', '.join(differ))
        if not report['sees_output']:
            problems.append(f'{worker}: does not see the output folder {out_dir} of this '
                            'machine (it must be the same shared folder, at the same path)')
        elif not report['writes_output']:
            problems.append(f'{worker}: cannot write into the output folder {out_dir}')
        missing = report['missing']
        if missing:
            shown = ', '.join(missing[:_MISSING_SHOWN])
            more = f' and {len(missing) - _MISSING_SHOWN} more' \
                if len(missing) > _MISSING_SHOWN else ''
            problems.append(f'{worker}: does not see {len(missing)} of {len(bags)} bags '
                            f'({shown}{more}); the bags must be at the same paths on every '
                            'worker')
    if problems:
        raise ClusterError(f'the cluster at {address} cannot replay these bags as this '
                           'machine would:\n  ' + '\n  '.join(problems))
    return len(reports)


# Per worker thread: the run's context, unpickled once (the Pinocchio model it builds on
# first use is then reused for every bag of the run, as a local worker process does).
_CONTEXT = threading.local()


def replay_on_worker(context: bytes, digest: str, bag: str, name: str, out_dir: str,
                     recorded_bag: str, recorded_out_dir: str) -> dict[str, Any]:
    """The task a worker runs for one bag: :func:`replay_bag`, then the digest of the
    report it wrote (so the client can check that it sees the same file).

    ``context`` is the pickled ``(model, certificates, options, events)``, ``digest`` its
    SHA-256. Returns ``entry``, ``worker`` (the worker's address) and ``report_sha256``.
    """
    if getattr(_CONTEXT, 'digest', None) != digest:
        _CONTEXT.value = pickle.loads(context)
        _CONTEXT.digest = digest
    model, certificates, options, events = _CONTEXT.value
    entry = replay_bag(bag, name, model, certificates, options, out_dir, events,
                       recorded_bag=recorded_bag, recorded_out_dir=recorded_out_dir)
    report_sha256 = None
    if entry['status'] == 'ok':
        report_sha256 = _sha256(Path(out_dir) / entry['report_json'])
    try:
        from distributed import get_worker

        worker = get_worker().address
    except (ImportError, ValueError):  # called outside a worker (tests, debugging)
        worker = 'this process'
    return {'entry': entry, 'worker': worker, 'report_sha256': report_sha256}


def _sha256(path: Path) -> str | None:
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return None


def _task_failure(bag: str, err: BaseException) -> str:
    """The per-bag error (one line) for a task the cluster could not bring to an end."""
    # Dask's messages may run over several lines; the summary has one line per bag.
    lines = str(err).strip().splitlines()
    reason = f'{type(err).__name__}: {lines[0] if lines else ""}'.rstrip(': ')
    distributed = sys.modules.get('distributed')
    if distributed is not None and isinstance(err, distributed.KilledWorker):
        return (f'{bag}: every worker that replayed it died (killed, or out of memory); '
                'the scheduler stopped retrying it')
    if isinstance(err, (asyncio.CancelledError, concurrent.futures.CancelledError)):
        return (f'{bag}: the cluster dropped it before it finished (scheduler restarted or '
                f'the connection to it lost): {reason}')
    return f'{bag}: the cluster could not replay it: {reason}'


def replay_on_cluster(address: str, bags: Sequence[str | Path], model: RobotModel,
                      certificates: Sequence[CertificateChoice], options: ReplayOptions,
                      out_dir: str | Path, *, names: Sequence[str],
                      events: EventLog | None = None, progress: bool = True,
                      connect_timeout_s: float = CONNECT_TIMEOUT_S
                      ) -> list[dict[str, Any]]:
    """Replay every bag on the workers of the Dask scheduler at ``address``.

    The same entries, reports and files as :func:`safety_filter.campaigns.replay_batch.replay_bags`
    run locally, with the paths spelled as given here. Bags and ``out_dir`` are sent as
    absolute paths (relative ones joined to this process's working folder; symbolic links
    are not resolved), which must name the same files on every worker. A progress bar goes
    to stderr when it is a terminal and ``progress`` is set.

    Raises:
        ClusterError: before any bag is replayed, when Dask distributed is missing, no
            scheduler answers at ``address`` within ``connect_timeout_s``, it has no
            workers, or a worker runs other versions or does not see the bags or the
            output folder.
    """
    from tqdm import tqdm

    distributed = _import_distributed()
    address, host, port = parse_address(address)
    bags = [str(b) for b in bags]
    names = list(names)
    if len(names) != len(bags):
        raise ShapeMismatch('names (one per bag)', len(bags), len(names))
    out_dir = Path(out_dir)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise ClusterError(f'cannot create the output folder {out_dir}: {err}') from err
    real_out = os.path.abspath(out_dir)
    real_bags = [os.path.abspath(bag) for bag in bags]
    _check_scheduler(address, host, port, connect_timeout_s)
    try:
        client = distributed.Client(address, timeout=connect_timeout_s,
                                    set_as_default=False)
    except Exception as err:
        raise ClusterError(f'cannot connect to the cluster scheduler at {address}: '
                           f'{type(err).__name__}: {err}') from err
    entries: list[dict[str, Any] | None] = [None] * len(bags)
    pending: dict[str, tuple[int, Any]] = {}
    bar = None
    try:
        _check_workers(client, Path(real_out), real_bags, connect_timeout_s, address)
        context = pickle.dumps((model, list(certificates), options, events))
        digest = hashlib.sha256(context).hexdigest()
        run = uuid.uuid4().hex[:12]
        bar = tqdm(total=len(bags), unit='bag', file=sys.stderr,
                   disable=None if progress else True, desc='replay', leave=False)
        for k, (bag, name) in enumerate(zip(bags, names)):
            # A key of its own per run and bag: a long-lived scheduler must never hand back
            # another run's result for the same bag.
            future = client.submit(replay_on_worker, context, digest, real_bags[k], name,
                                   real_out, bag, str(out_dir),
                                   key=f'safety-filter-replay-{run}-{k}', pure=False)
            pending[future.key] = (k, future)
        for future in distributed.as_completed([f for _, f in pending.values()],
                                               loop=client.loop):
            k, _ = pending.pop(future.key)
            try:
                outcome = future.result()
            # (asyncio's CancelledError is no Exception: a cancelled task is a bag's failure)
            except (Exception, asyncio.CancelledError) as err:  # worker deaths, cancelled
                entries[k] = failed_entry(bags[k], names[k], _task_failure(bags[k], err))
            else:
                entries[k] = _checked_entry(outcome, out_dir)
            # Let the scheduler forget the result: a finished bag must not be run again
            # because the worker that holds its (already received) result dies later.
            future.release()
            bar.update(1)
    finally:
        if bar is not None:
            bar.close()
        for k, future in pending.values():  # interrupted: take the tasks off the cluster
            future.cancel()
        client.close()
    return [e if e is not None else failed_entry(bags[k], names[k], f'{bags[k]}: not replayed')
            for k, e in enumerate(entries)]


def _checked_entry(outcome: dict[str, Any], out_dir: Path) -> dict[str, Any]:
    """The worker's entry, failed if its report is not the file this machine sees."""
    entry = outcome['entry']
    if entry['status'] != 'ok':
        return entry
    if _sha256(out_dir / entry['report_json']) != outcome['report_sha256']:
        return failed_entry(entry['bag'], entry['name'],
                            f'{entry["bag"]}: replayed on the worker {outcome["worker"]}, '
                            f'but its report is not in {out_dir} on this machine: the '
                            'output folder must be shared with every worker at the same '
                            'path')
    return entry
