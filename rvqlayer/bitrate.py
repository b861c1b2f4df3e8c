"""Bits per vector and bitrate of fixed-length residual codes."""

from __future__ import annotations

import math

from ._checks import check_float, check_int, fail


def bits_per_vector(stages: int, entries: int) -> float:
    """``stages * log2(entries)`` bits for one vector.

    >>> bits_per_vector(8, 1024)
    80.0
    """
    check_int("stages", stages, 0)
    check_int("entries", entries, 1)
    return stages * math.log2(entries)


def bitrate(frame_rate: float, stages: int, entries: int) -> float:
    """Bits per second: ``frame_rate`` (vectors per second) times bits per vector.

    Common practice: 75 frames/s, 1024 entries, 8 stages give 6000 bit/s.

    >>> bitrate(75.0, 8, 1024)
    6000.0
    """
    rate = check_float("frame_rate", frame_rate, 0.0, float("inf"), low_open=True, high_open=True)
    bits = rate * bits_per_vector(stages, entries)
    if not math.isfinite(bits):
        raise fail("frame_rate", "small enough for a finite bitrate", f"{frame_rate!r} ({bits} bit/s)")
    return bits
