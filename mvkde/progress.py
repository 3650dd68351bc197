"""Progress of long computations: a bar on a terminal, log lines or nothing elsewhere.

The pipeline reports its blocks (log lines when the output is not a
terminal, for batch-job logs); library calls that take seconds (bootstrap
replicates) show a bar only where a terminal is attached, so scripts and
notebooks stay quiet.
"""

from __future__ import annotations

import sys
import time

__all__ = ["Progress"]


class Progress:
    """Count ``total`` steps of a job named ``label``.

    Parameters
    ----------
    total : int
        Number of steps.
    stream : file, optional
        Where to write (default ``sys.stderr``).
    label : str
        What a step is ("blocks", "bootstrap replicates").
    prefix : str
        Start of each log line ("mvkde run").
    log_lines : bool
        Off a terminal, write a line every 10 % or 30 s (True) or nothing (False).
    """

    def __init__(self, total: int, stream=None, label="blocks", prefix="mvkde run", log_lines=True):
        self.total, self.done, self.label, self.prefix = max(1, total), 0, label, prefix
        self.stream = stream if stream is not None else sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.log_lines = log_lines
        self.t0 = self.last = time.perf_counter()
        self.last_tenth = -1

    def update(self, n: int = 1) -> None:
        """Count ``n`` more steps and redraw the bar (terminal) or write a log line when due.

        Parameters
        ----------
        n : int
        """
        self.done += n
        now = time.perf_counter()
        frac = self.done / self.total
        if self.tty:
            if now - self.last < 0.2 and self.done < self.total:
                return
            self.last = now
            width = 30
            fill = int(round(width * frac))
            self.stream.write(f"\r[{'#' * fill}{'.' * (width - fill)}] {self.done}/{self.total} {self.label} "
                              f"{now - self.t0:6.1f} s")
            if self.done >= self.total:
                self.stream.write("\n")
            self.stream.flush()
            return
        if not self.log_lines:
            return
        tenth = int(frac * 10)
        if tenth > self.last_tenth or now - self.last > 30 or self.done >= self.total:
            self.last_tenth, self.last = tenth, now
            print(f"{self.prefix}: {self.done}/{self.total} {self.label} done ({100 * frac:.0f} %), "
                  f"{now - self.t0:.1f} s", file=self.stream, flush=True)
