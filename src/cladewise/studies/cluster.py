"""Running many cladewise tasks on a dask cluster: local, or one started elsewhere.

The grid (:mod:`cladewise.studies.grid`), fits over a tree sample
(:mod:`cladewise.studies.cluster_trees`), the power study and the simulation-based
calibration send their tasks through :func:`run_tasks`. Two kinds of cluster:

* ``scheduler=None``: a dask ``LocalCluster`` on this machine (worker processes of
  one thread each), started and stopped here.
* ``scheduler="tcp://host:8786"`` (or a scheduler file written by
  ``dask scheduler --scheduler-file F``): a scheduler and workers started on their
  own (``dask scheduler``, ``dask worker ADDRESS``), on a lab server or a batch
  system. The workers need cladewise installed, nothing else: every input travels
  with its task and every result comes back to the client, which writes the output.

Seeds never depend on the worker: each task carries its own seed, fixed by the
client before anything is sent, so a study gives the same numbers on one process
and on any cluster.

A worker that dies in the middle of a task: the scheduler gives the task to another
worker (dask's own rescheduling, up to ``distributed.scheduler.allowed-failures``
times); results are gathered by the client, so each arrives once.

Compiled models are reused on each worker: :func:`worker_memo` keeps a few objects
(built and compiled models) in the worker process, keyed by what they are built
from, and the on-disk compile cache (:mod:`cladewise.inference.compile_cache`,
``CLADEWISE_CACHE_DIR``) serves other processes on the same machine or a shared
file system.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import pickle
import threading
import time
import uuid
from collections import OrderedDict
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

from cladewise.errors import InputError

__all__ = [
    "TaskCounts",
    "connect",
    "run_tasks",
    "worker_memo",
    "memo_key",
    "report_start",
    "memo_stats",
    "map_study",
]

_MEMO: "OrderedDict[str, Any]" = OrderedDict()
_MEMO_LOCK = threading.Lock()
_MEMO_MAX = 4  # a few models per worker: enough for a grid's specs, bounded memory
_MEMO_STATS = {"hits": 0, "misses": 0}


# =========================================================================== worker side
def memo_key(*parts: Any) -> str:
    """SHA-256 of the pickled ``parts``: equal inputs give equal keys."""
    return hashlib.sha256(pickle.dumps(parts, protocol=4)).hexdigest()


def worker_memo(key: str, factory: Callable[[], Any]) -> Any:
    """The object made by ``factory`` for ``key``, made once per worker process.

    Keeps the :data:`_MEMO_MAX` most recently used objects (compiled models are a few
    MB each). The key must cover everything the object is built from (use
    :func:`memo_key` on the inputs), so a hit is always the same object a fresh
    build would give.
    """
    with _MEMO_LOCK:
        if key in _MEMO:
            _MEMO.move_to_end(key)
            _MEMO_STATS["hits"] += 1
            return _MEMO[key]
    obj = factory()
    with _MEMO_LOCK:
        _MEMO_STATS["misses"] += 1
        _MEMO[key] = obj
        while len(_MEMO) > _MEMO_MAX:
            _MEMO.popitem(last=False)
    return obj


def memo_stats() -> dict[str, int]:
    """Hits and misses of :func:`worker_memo` in this process."""
    return dict(_MEMO_STATS)


def report_start(tag: tuple[str, str] | None) -> None:
    """Tell the client that a task started (a dask worker event; no-op elsewhere).

    ``tag`` is the last argument :func:`run_tasks` gives each task (topic, name).
    """
    if not tag:
        return
    try:
        from distributed import get_worker

        topic, name = tag
        get_worker().log_event(topic, {"name": name, "event": "start"})
    except Exception:  # not on a worker (a plain call), or an old dask: progress only
        pass


# =========================================================================== client side
@dataclass
class TaskCounts:
    """How far a run of tasks is: counts and the state of each task by name.

    ``states`` maps each task name to ``"waiting"``, ``"running"``, ``"done"``,
    ``"failed"`` or ``"skipped"`` (finished by an earlier run).
    """

    states: dict[str, str] = field(default_factory=dict)
    started: float = field(default_factory=time.time)
    last: str = ""

    def count(self, state: str) -> int:
        return sum(1 for s in self.states.values() if s == state)

    @property
    def total(self) -> int:
        return len(self.states)

    @property
    def remaining(self) -> int:
        """Tasks not finished yet (waiting or running)."""
        return self.count("waiting") + self.count("running")

    def as_dict(self) -> dict[str, Any]:
        return {"total": self.total, "done": self.count("done"), "running": self.count("running"),
                "failed": self.count("failed"), "skipped": self.count("skipped"),
                "waiting": self.count("waiting"), "remaining": self.remaining,
                "elapsed_seconds": round(time.time() - self.started, 1)}

    def line(self) -> str:
        d = self.as_dict()
        return (f"{d['done'] + d['skipped']}/{d['total']} finished ({d['done']} done, {d['skipped']} skipped), "
                f"{d['running']} running, {d['failed']} failed, {d['remaining']} remaining")


def _address(scheduler: str) -> str:
    """An address, or the address inside a scheduler file (``dask scheduler --scheduler-file``)."""
    p = Path(scheduler).expanduser()
    if "://" not in scheduler and p.is_file():
        import json

        try:
            return str(json.loads(p.read_text())["address"])
        except (OSError, ValueError, KeyError, TypeError):
            raise InputError(f"{scheduler} is not a dask scheduler file (no 'address' in it)") from None
    return scheduler


@contextlib.contextmanager
def connect(scheduler: str | None = None, n_workers: int = 2,
            say: Callable[[str], None] | None = None) -> Iterator[Any]:
    """A dask ``Client``: to the scheduler at ``scheduler``, or to a new LocalCluster.

    Parameters
    ----------
    scheduler : str, optional
        ``tcp://host:port`` or the path of a scheduler file. Default: a LocalCluster
        of ``n_workers`` processes with one thread each, closed on exit.
    n_workers : int
        Worker processes of the local cluster.
    say : callable, optional
        Receives one line saying where the tasks go.

    Raises
    ------
    InputError
        The scheduler cannot be reached, or ``n_workers`` is not a positive integer.
    """
    from dask.distributed import Client, LocalCluster

    if not isinstance(n_workers, int) or n_workers < 1:
        raise InputError(f"--workers must be a positive whole number, not {n_workers!r}")
    cluster = None
    if scheduler:
        address = _address(scheduler)
        try:
            client = Client(address, timeout="20s")
        except (OSError, TimeoutError, ValueError) as exc:
            raise InputError(f"cannot reach the dask scheduler at {scheduler!r} ({exc}); check the address "
                             "(printed by `dask scheduler`, or its --scheduler-file)") from None
        if say:
            n = len(client.scheduler_info(n_workers=-1).get("workers", {})) if hasattr(client, "scheduler_info") else 0
            say(f"connected to the dask scheduler at {address} ({n} worker(s) now)")
    else:
        cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                               dashboard_address=None, silence_logs=logging.ERROR)
        client = Client(cluster)
        if say:
            say(f"started a local dask cluster: {n_workers} worker process(es), 1 thread each")
    try:
        yield client
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def run_tasks(
    client: Any,
    fn: Callable[..., Any],
    tasks: Sequence[tuple[str, tuple]],
    *,
    counts: TaskCounts | None = None,
    on_change: Callable[[TaskCounts], None] | None = None,
    state_of: Callable[[Any], str] | None = None,
    poll: float = 1.0,
) -> Iterator[tuple[str, Any, BaseException | None]]:
    """Submit ``fn(*args, tag)`` for each ``(name, args)`` and yield results as they finish.

    Yields ``(name, result, error)``: ``error`` is the exception when the task
    could not run (its worker died more often than dask allows, or it raised);
    then ``result`` is None. Each name is yielded exactly once. ``counts`` (made
    here if not given) is updated as tasks start and finish, and ``on_change`` is
    called after every change (checked every ``poll`` seconds while waiting).
    ``state_of(result)`` names the final state of a task that returned (default
    ``"done"``; a grid fit that failed on its worker returns a row saying so).

    ``fn`` receives a last argument ``tag``: pass it to :func:`report_start`
    at the start of the task so the client can count running tasks.
    """
    from dask.distributed import wait

    counts = counts or TaskCounts()
    lock = threading.Lock()
    token = uuid.uuid4().hex[:8]
    topic = f"cladewise-{token}"
    for name, _ in tasks:
        counts.states.setdefault(name, "waiting")

    def changed() -> None:
        if on_change is not None:
            on_change(counts)

    def started(event: Any) -> None:
        msg = event[1] if isinstance(event, tuple) and len(event) == 2 else event
        name = msg.get("name") if isinstance(msg, dict) else None
        with lock:
            if name in counts.states and counts.states[name] == "waiting":
                counts.states[name] = "running"
                counts.last = f"{name}: started"

    subscribed = False
    try:
        client.subscribe_topic(topic, started)
        subscribed = True
    except Exception:  # an older dask: no running count, everything else works
        pass
    futures = {}
    for name, args in tasks:
        fut = client.submit(fn, *args, (topic, name), key=f"cladewise-{name}-{token}", pure=False)
        futures[fut] = name
    changed()
    remaining = set(futures)
    seen_running = counts.count("running")
    try:
        while remaining:
            try:
                finished, _ = wait(list(remaining), timeout=poll, return_when="FIRST_COMPLETED")
            except TimeoutError:
                finished = set()
            with lock:
                now_running = counts.count("running")
            if not finished:
                if now_running != seen_running:
                    seen_running = now_running
                    changed()
                continue
            for fut in [f for f in futures if f in finished]:  # submission order within a batch
                remaining.discard(fut)
                name = futures[fut]
                try:
                    res, err = fut.result(), None
                except Exception as exc:  # a task that raised, or KilledWorker
                    res, err = None, exc
                with lock:
                    counts.states[name] = "failed" if err is not None else (state_of(res) if state_of else "done")
                    counts.last = f"{name}: {counts.states[name]}"
                    seen_running = counts.count("running")
                yield name, res, err
                changed()
    finally:
        if subscribed:
            with contextlib.suppress(Exception):
                client.unsubscribe_topic(topic)
        for fut in futures:
            if not fut.done():
                fut.cancel()


def map_study(
    fn: Callable[..., Any],
    items: Sequence[tuple],
    *,
    scheduler: str | None,
    n_workers: int = 2,
    progress: Callable[[str], None] | None = None,
    what: str = "fits",
) -> list[Any]:
    """``[fn(*item, None) for item in items]`` run as one task per item on a cluster.

    For the studies (power, calibration, tree samples): every item carries its own
    seed, so the list equals the one a plain loop gives. Results come back in item
    order. ``progress`` receives a line every tenth result and at the end.

    Raises
    ------
    RuntimeError
        A task failed (its worker died more often than dask allows, or it raised);
        a study is not reported from part of its fits.
    """
    out: list[Any] = [None] * len(items)
    tasks = [(f"{what}-{i}", tuple(item)) for i, item in enumerate(items)]
    index = {name: i for i, (name, _) in enumerate(tasks)}
    t0 = time.perf_counter()
    with connect(scheduler, n_workers, progress) as client:
        counts = TaskCounts()
        for k, (name, res, err) in enumerate(run_tasks(client, fn, tasks, counts=counts), 1):
            if err is not None:
                raise RuntimeError(f"{what}: task {name} failed on the cluster: {type(err).__name__}: {err}")
            out[index[name]] = res
            if progress is not None and (k % 10 == 0 or k == len(tasks)):
                progress(f"{k}/{len(tasks)} {what} ({(time.perf_counter() - t0) / k:.1f} s per fit "
                         f"over the cluster; {counts.count('running')} running)")
    return out
