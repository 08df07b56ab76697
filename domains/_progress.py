"""Progress of a run: a bar that names the step about to run, and the time each step took."""

from __future__ import annotations


class Progress:
    """A progress bar that names the step about to run ("drift", "lock-in", "walls" ...).

    It also times the steps: ``times[name]`` is the wall-clock time from the call that
    announced ``name`` to the next call.
    """

    def __init__(self, total, enabled):
        import time

        from tqdm.auto import tqdm

        self._clock = time.perf_counter
        self._name, self._start, self.times = "level", self._clock(), {}
        self.bar = tqdm(total=total, desc="domains: level", unit="step", disable=not enabled, leave=False)

    def __call__(self, next_step=None, n=1):
        now = self._clock()
        self.times[self._name] = self.times.get(self._name, 0.0) + now - self._start
        self._start = now
        if next_step:
            self._name = next_step
            self.bar.set_description(f"domains: {next_step}")
        self.bar.update(n)

    def close(self):
        self.bar.close()


def progress(total, enabled):
    """A :class:`Progress` of ``total`` steps (hidden when not ``enabled``)."""
    return Progress(total, enabled)
