"""Progress lines on a text stream (stderr): what is done, time elapsed and time left."""

from __future__ import annotations

import math
import time
from typing import TextIO

import numpy as np


def duration_text(seconds: float) -> str:
    """``1h02m03s``, ``4m05s`` or ``7s``."""
    seconds = int(round(max(seconds, 0.0)))
    hours, rest = divmod(seconds, 3600)
    minutes, secs = divmod(rest, 60)
    if hours:
        return f"{hours}h{minutes:02d}m{secs:02d}s"
    return f"{minutes}m{secs:02d}s" if minutes else f"{secs}s"


#: Seconds between two progress lines on stderr.
PROGRESS_EVERY = 5.0


class Progress:
    """Datasets done / total, elapsed and estimated time left, on a text stream.

    The estimate scales the time spent on replicates so far by the share of replicate
    work (replicates x samples x taxa) still to do. A line is written at most every
    ``every`` seconds, and always for the last dataset. ``stream=None`` writes nothing.
    """

    def __init__(self, total: int, stream: TextIO | None, every: float = PROGRESS_EVERY,
                 noun: str = "datasets") -> None:
        self.total, self.stream, self.every, self.noun = total, stream, every, noun
        self.done = 0
        self.work = self.work_done = 0.0
        self.start = self.work_start = time.monotonic()
        self.last_line = -np.inf

    def write(self, text: str) -> None:
        if self.stream is not None:
            print(f"driftscreen: {text}", file=self.stream, flush=True)

    def counted(self, n_datasets: int) -> None:
        """Datasets that need no work (reused or not analysable): counted, no line."""
        self.done += n_datasets

    def planned(self, n_datasets: int, n_chunks: int, work: float, stage: str = "fitted"
                ) -> None:
        """The replicate work is laid out (``stage``: what was done to plan it); the time
        estimate starts now."""
        self.work, self.work_start = work, time.monotonic()
        if n_chunks:
            self.write(f"{stage} {n_datasets} datasets in "
                       f"{duration_text(self.work_start - self.start)}; running {n_chunks} "
                       "chunks of neutral replicates")

    def chunk_finished(self, work: float) -> None:
        self.work_done += work

    def dataset_finished(self) -> None:
        self.done += 1
        now = time.monotonic()
        if now - self.last_line < self.every and self.done < self.total:
            return
        self.last_line = now
        line = (f"{self.done}/{self.total} {self.noun} done, "
                f"{duration_text(now - self.start)} elapsed")
        if self.done < self.total and 0 < self.work_done < self.work:
            left = (now - self.work_start) * (self.work - self.work_done) / self.work_done
            line += f", about {duration_text(left)} left"
        self.write(line)


class PowerProgress:
    """``k/n datasets tested, elapsed, about ... left`` on a stream, at most every few seconds."""

    def __init__(self, total: int, stream: TextIO | None) -> None:
        self.total, self.stream = total, stream
        self.done = 0
        self.start = time.monotonic()
        self.last_line = -math.inf

    def dataset_finished(self) -> None:
        self.done += 1
        now = time.monotonic()
        if self.stream is None or (now - self.last_line < PROGRESS_EVERY
                                   and self.done < self.total):
            return
        self.last_line = now
        elapsed = now - self.start
        line = f"{self.done}/{self.total} datasets tested, {duration_text(elapsed)} elapsed"
        if self.done < self.total:
            line += f", about {duration_text(elapsed * (self.total / self.done - 1))} left"
        print(f"driftscreen: power: {line}", file=self.stream, flush=True)
