"""Progress of a batch: the progress line and the summary of a run."""

from __future__ import annotations

import math
import sys
import time
from dataclasses import dataclass
from dataclasses import field


# ---------------------------------------------------------------- progress
class Progress:
    """A bar on a terminal (tqdm), plain periodic lines otherwise (logs, CI)."""

    def __init__(self, total, stream=None, enabled=True, every=10.0):
        self.total = total
        self.stream = stream or sys.stderr
        self.enabled = enabled
        self.every = every
        self.done = self.failed = 0
        self.started = self.last = time.perf_counter()
        self.bar = None
        if enabled and getattr(self.stream, "isatty", lambda: False)():
            try:
                from tqdm import tqdm

                self.bar = tqdm(total=total, file=self.stream, unit="structure", dynamic_ncols=True,
                                desc="screen", smoothing=0.1)
            except ImportError:
                self.bar = None

    def update(self, ok, failed):
        self.done += ok + failed
        self.failed += failed
        if not self.enabled:
            return
        if self.bar is not None:
            self.bar.update(ok + failed)
            self.bar.set_postfix_str(f"failed {self.failed}", refresh=False)
            return
        now = time.perf_counter()
        if now - self.last >= self.every:
            self.last = now
            print(self.line(), file=self.stream, flush=True)

    def line(self):
        elapsed = time.perf_counter() - self.started
        rate = self.done / elapsed if elapsed > 0 else 0.0
        left = (self.total - self.done) / rate if rate > 0 and self.total else math.nan
        share = f" ({100 * self.done / self.total:.0f}%)" if self.total else ""
        eta = f", ETA {left:.0f} s" if math.isfinite(left) else ""
        waiting = "; workers starting (a first run compiles the Numba kernels once)" if self.done == 0 else ""
        return f"screen: {self.done}/{self.total}{share} done, {self.failed} failed, {rate:.1f}/s{eta}{waiting}"

    def close(self):
        if self.bar is not None:
            self.bar.close()


# ---------------------------------------------------------------- the job
@dataclass(frozen=True)
class ScreenSummary:
    """What a job did.

    Attributes
    ----------
    total : structures in the input.
    ok, failed : rows screened in this run with status ok / with an error.
    skipped : structures already ok in the table (``resume``).
    seconds : wall time of the run, s.
    out, sites : the tables written.
    executor : ``"local pool (N workers)"`` or ``"dask (ADDRESS)"``.
    """

    total: int
    ok: int
    failed: int
    skipped: int
    seconds: float
    out: str
    sites: str | None
    executor: str
    failures: tuple = field(default=())

    @property
    def rate(self) -> float:
        """Structures screened per second in this run."""
        return (self.ok + self.failed) / self.seconds if self.seconds > 0 else math.nan

    def line(self) -> str:
        skipped = f", {self.skipped} already done (resume)" if self.skipped else ""
        return (f"screen: {self.total} structures: {self.ok} ok, {self.failed} failed{skipped}; "
                f"{self.seconds:.1f} s ({self.rate:.1f}/s) on {self.executor}; table {self.out}")

    def to_dict(self):
        """JSON-ready: counts of structures, wall seconds, structures per second (None when no time
        passed), the table paths, the executor and the failures with their messages."""
        return {"total": self.total, "ok": self.ok, "failed": self.failed, "skipped": self.skipped,
                "seconds": self.seconds, "structures_per_second": self.rate if math.isfinite(self.rate) else None,
                "out": self.out,
                "sites": self.sites, "executor": self.executor,
                "failures": [{"source": s, "status": m} for s, m in self.failures]}
