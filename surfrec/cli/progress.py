"""Progress reporting on stderr: a bar on a terminal, log lines otherwise."""

from __future__ import annotations

import logging
import sys
import time

import click

log = logging.getLogger("surfrec")


class Progress:
    """Report ``done / total`` items.

    A bar is drawn only when stderr is a terminal; otherwise a log line every
    ``every_s`` seconds, so batch logs stay readable.

    ``initial`` items were done before (a resumed run): they count towards
    ``done / total`` but not towards the rate, which is this session's.
    """

    def __init__(self, total: int, label: str, every_s: float = 10.0, *, initial: int = 0):
        self.total = total
        self.label = label
        self.every_s = every_s
        self.start = time.monotonic()
        self.last = self.start
        self.bar = None
        self.initial = int(initial)
        if sys.stderr.isatty() and log.getEffectiveLevel() <= logging.INFO:
            self.bar = click.progressbar(length=total, label=label, file=sys.stderr, show_eta=True)
            self.bar.__enter__()
            if self.initial:
                self.bar.update(self.initial)
        self.done = self.initial

    def __call__(self, done: int):
        step = done - self.done
        self.done = done
        if self.bar is not None:
            if self.initial and done > self.initial:
                # click's ETA takes the time per item as the time since the start over
                # every item done, which counts the earlier sessions' items as free:
                # give it this session's time per item instead.
                per = (time.monotonic() - self.start) / (done - self.initial)
                self.bar.avg = [per] * 7
            self.bar.update(step)
            return
        now = time.monotonic()
        if now - self.last >= self.every_s or done == self.total:
            self.last = now
            rate = (done - self.initial) / max(now - self.start, 1e-9)
            eta = (self.total - done) / rate if rate > 0 else float("inf")
            log.info("%s: %d/%d (%.2f per s, %.0f s left)", self.label, done, self.total, rate, eta)

    def close(self):
        if self.bar is not None:
            self.bar.__exit__(None, None, None)
            self.bar = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
