"""Progress of a run: a bar that names the step about to run, the time each step took, and how far
the dask computation inside a step has gone.

A lazy (dask-backed) run spends minutes in one step; the bar then shows the tasks of the
computation running inside the step in its postfix (``domains: lock-in: 3/8 [..., 37/120 tasks]``):

- with dask's local scheduler, a :class:`dask.callbacks.Callback` counts the finished tasks
  of the current ``compute``;
- with a dask.distributed client in use (``--scheduler``), a thread asks the scheduler twice
  a second how many tasks of the results this client waits for (and of everything they
  depend on) are done.

Nothing of this runs when the bar is hidden. ``dask`` is looked at only when something has
already imported it (an input in memory never does), and ``dask.distributed`` only when
something has already imported it and a client exists.
"""

from __future__ import annotations

import functools
import sys
import threading
import weakref

#: Seconds between two redraws of the task count (the count itself is kept for every task).
REDRAW_S = 0.2
#: Seconds between two questions to a dask.distributed scheduler.
POLL_S = 0.5


class Progress:
    """A progress bar that names the step about to run ("drift", "lock-in", "walls" ...).

    It also times the steps: ``times[name]`` is the wall-clock time from the call that
    announced ``name`` to the next call; and counts the dask tasks run in each step:
    ``tasks[name] = [finished, total]`` summed over the step's computations (with a
    dask.distributed client: the largest counts the scheduler reported during the step).

    Parameters
    ----------
    total : int
        Number of steps.
    enabled : bool
        Draw the bar (to stderr) and follow dask computations. When False nothing is
        drawn and nothing is registered with dask.
    first : str
        Name of the first step. A ``with`` block closes the bar at its end, also on an error.

    Examples
    --------
    >>> bar = Progress(2, enabled=False)
    >>> bar("lock-in")
    >>> bar("done")
    >>> bar.close()
    >>> sorted(bar.times), bar.tasks
    (['level', 'lock-in'], {})
    """

    def __init__(self, total, enabled, first="level"):
        import time

        from tqdm.auto import tqdm

        self._clock = time.perf_counter
        self._name, self._start, self.times, self.tasks = first, self._clock(), {}, {}
        self.bar = tqdm(total=total, desc=f"domains: {first}", unit="step", disable=not enabled, leave=False)
        self._drawn = 0.0
        self._closed = False
        self._stop = []  # what close() undoes: a callback to unregister, a thread to stop
        if enabled:
            self._follow_dask()

    # ------------------------------------------------------------------ steps

    def __call__(self, next_step=None, n=1):
        now = self._clock()
        self.times[self._name] = self.times.get(self._name, 0.0) + now - self._start
        self._start = now
        if next_step:
            self._name = next_step
            self.bar.set_description(f"domains: {next_step}", refresh=False)
            self.bar.set_postfix_str("", refresh=False)
        self.bar.update(n)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def close(self):
        """Close the bar and stop following dask computations (safe to call twice)."""
        self._closed = True
        for stop in self._stop:
            stop()
        self._stop = []
        self.bar.close()

    # ------------------------------------------------------------------ dask

    def _follow_dask(self):
        if "dask" not in sys.modules:  # nothing lazy in this process: nothing to follow
            return
        client = _current_client()
        if client is not None:
            poller = _ClientPoller(self, client)
            self._stop.append(poller.stop)
            weakref.finalize(self, poller.stop)
        else:
            callback = _TaskCounter(self)
            callback.register()
            self._stop.append(callback.unregister_once)
            weakref.finalize(self, callback.unregister_once)

    def _show(self, done, total, unit, final=False):
        """Put ``done/total unit`` in the bar's postfix, redrawn at most every REDRAW_S seconds."""
        if self._closed:
            return
        self.bar.set_postfix_str(f"{done}/{total} {unit}", refresh=False)
        now = self._clock()
        if final or now - self._drawn >= REDRAW_S:
            self._drawn = now
            self.bar.refresh()


def _current_client():
    """The dask.distributed client in use, or None; never imports dask.distributed."""
    if "distributed" not in sys.modules:
        return None
    try:
        from distributed import default_client

        return default_client()
    except (ImportError, ValueError):  # no client
        return None


@functools.lru_cache(maxsize=None)
def _task_counter_class():
    from dask.callbacks import Callback

    class TaskCounter(Callback):
        """Counts the finished tasks of each computation of dask's local scheduler."""

        def __init__(self, progress):
            super().__init__()
            self._progress = weakref.ref(progress)
            self._state, self._depth, self._done = None, 0, 0
            self._registered = False

        def register(self):
            super().register()
            self._registered = True

        def unregister_once(self):
            if self._registered:
                self._registered = False
                self.unregister()

        def _start_state(self, dsk, state):
            self._depth += 1
            if self._depth == 1:  # a compute inside a task (depth > 1) belongs to the outer one
                self._state, self._done = state, 0

        def _posttask(self, key, result, dsk, state, worker_id):
            if state is not self._state:
                return
            self._done += 1
            self._draw(final=False)

        def _finish(self, dsk, state, errored):
            self._depth = max(0, self._depth - 1)
            if state is self._state:
                progress = self._progress()
                if progress is not None:
                    total = self._total()
                    record = progress.tasks.setdefault(progress._name, [0, 0])
                    record[0] += self._done
                    record[1] += total
                    self._draw(final=True)
                self._state = None

        def _total(self):
            s = self._state
            return self._done + sum(len(s.get(k, ())) for k in ("ready", "waiting", "running"))

        def _draw(self, final):
            progress = self._progress()
            if progress is not None and self._state is not None:
                progress._show(self._done, self._total(), "tasks", final=final)

    return TaskCounter


def _TaskCounter(progress):  # noqa: N802 - a class built on first use (dask imported only then)
    return _task_counter_class()(progress)


class _ClientPoller:
    """Asks the scheduler of a dask.distributed client, every POLL_S seconds (in a thread), how far
    the computations this client waits for have gone.

    The count is over the task groups (one per dask layer: "lock-in" blocks, "level" blocks ...)
    of the results the client wants and of every group they depend on: tasks in memory, erred,
    or released after use are done. Other clients of a shared cluster are not counted.
    """

    def __init__(self, progress, client):
        self._progress = weakref.ref(progress)
        self._client = client
        self._count = _scheduler_count_function()
        self._event = threading.Event()
        self._thread = threading.Thread(target=self._run, name="domains-progress", daemon=True)
        self._thread.start()

    def counts(self):
        """(finished, total) tasks of the computations the client waits for now."""
        return self._client.run_on_scheduler(self._count, client_id=self._client.id)

    def _run(self):
        while not self._event.wait(POLL_S):
            progress = self._progress()
            if progress is None:
                return
            try:
                done, total = self.counts()
            except Exception:  # noqa: BLE001 - a scheduler that refuses (or a closing client): stop counting
                return
            if total:
                record = progress.tasks.setdefault(progress._name, [0, 0])
                record[0], record[1] = max(record[0], done), max(record[1], total)
                progress._show(done, total, "tasks")
            del progress

    def stop(self):
        self._event.set()


def _scheduler_count_function():
    """The function run on the scheduler; defined here (not at module level) so that it is sent by
    value: the scheduler needs no copy of this package."""

    def count(client_id, dask_scheduler=None):
        client = dask_scheduler.clients.get(client_id)
        if client is None:
            return 0, 0
        todo = [ts.group for ts in client.wants_what if ts.group is not None]
        seen, done, total = set(), 0, 0
        while todo:
            group = todo.pop()
            if id(group) in seen:
                continue
            seen.add(id(group))
            todo.extend(group.dependencies)
            for state, n in group.states.items():
                total += n
                if state in ("memory", "released", "forgotten", "erred"):
                    done += n
        return done, total

    return count


def progress(total, enabled, first="level"):
    """A :class:`Progress` of ``total`` steps (hidden when not ``enabled``).

    Parameters
    ----------
    total : int
        Number of steps.
    enabled : bool
        Draw it.
    first : str
        Name of the first step.

    Returns
    -------
    Progress

    Examples
    --------
    >>> bar = progress(3, enabled=False)
    >>> bar("drift"); bar.close()
    >>> list(bar.times)
    ['level']
    >>> with progress(1, enabled=False, first="writing the bundle") as bar:
    ...     pass
    """
    return Progress(total, enabled, first)
