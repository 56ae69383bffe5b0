"""Timestamp checks: gaps, duplicated timestamps and clock jumps backwards, counted and held to limits."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from coreach.errors import DataError
from coreach.recordings.recording import Stream


@dataclass
class TimingLimits:
    """What a stream may contain before its recording is refused (counts are per stream)."""

    gap_s: float = 0.5  # an interval longer than this is a gap
    max_gaps: int = 0
    max_duplicates: int = 10
    max_backwards: int = 0


@dataclass
class TimingReport:
    """What was found in one stream (counts) and what was kept."""

    source: str
    topic: str
    samples: int
    kept: int
    gaps: int
    largest_gap_s: float
    duplicates: int
    backwards: int
    largest_jump_back_s: float

    def as_dict(self) -> dict:
        return dict(self.__dict__)


def check_stream(stream: Stream, source: str, limits: TimingLimits) -> tuple[Stream, TimingReport]:
    """Count problems, refuse the recording past a limit (DataError naming source, topic and finding), and
    return the stream with duplicated and backwards samples dropped (a sample is kept only when it is
    later than every sample before it)."""
    where = f"{source}: topic {stream.topic}"
    t = np.asarray(stream.t, dtype=np.float64)
    if t.size < 2:
        raise DataError(where, f"has {t.size} message(s); expected at least 2 to resample")
    if not np.isfinite(t).all():
        raise DataError(where, "has timestamps that are not finite numbers")
    d = np.diff(t)
    duplicates, backwards = int((d == 0).sum()), int((d < 0).sum())
    jump_back = float(-d.min()) if backwards else 0.0
    keep = np.r_[True, t[1:] > np.maximum.accumulate(t)[:-1]]
    kept_t = t[keep]
    intervals = np.diff(kept_t)
    gap_rows = np.flatnonzero(intervals > limits.gap_s)
    largest_gap = float(intervals.max()) if intervals.size else 0.0
    report = TimingReport(source, stream.topic, int(t.size), int(keep.sum()), int(gap_rows.size), largest_gap,
                          duplicates, backwards, jump_back)  # fmt: skip
    if backwards > limits.max_backwards:
        at = float(t[np.flatnonzero(d < 0)[0]] - t[0])
        raise DataError(where, f"timestamps are not monotonic: the clock jumps back {backwards} time(s) (first "
                               f"at {at:.3f} s, largest {jump_back:.3f} s); allowed {limits.max_backwards} "
                               "(checks.max_backwards)")  # fmt: skip
    if duplicates > limits.max_duplicates:
        raise DataError(where, f"{duplicates} duplicated timestamps; allowed {limits.max_duplicates} "
                               "(checks.max_duplicates)")  # fmt: skip
    if gap_rows.size > limits.max_gaps:
        at = float(kept_t[gap_rows[0]] - kept_t[0])
        raise DataError(where, f"{gap_rows.size} gap(s) longer than {limits.gap_s} s (first at {at:.3f} s, "
                               f"largest {largest_gap:.3f} s); allowed {limits.max_gaps} (checks.max_gaps)")
    return Stream(stream.topic, kept_t, np.asarray(stream.values, dtype=np.float64)[keep]), report
