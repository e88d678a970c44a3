"""SMPTE timecode (SMPTE ST 12-1) for lining the controls up with body, camera and audio.

A timecode is ``HH:MM:SS:FF`` at a rate: the label of a frame, not a time. The rates are the
usual ones, named as on set (``"23.976"`` is 24000/1001 frames per second, and so on); the frame
field counts to the nominal rate (24, 25, 30, 48, 50 or 60). Drop-frame timecode (``;`` before
the frames, as SMPTE ST 12-1 writes it) exists at 29.97 and 59.94: to keep the labels near the
clock, the first 2 (at 59.94: 4) frame labels of every minute are skipped, except in the minutes
divisible by 10, so those labels do not exist.

:func:`timecode_to_frames` and :func:`frames_to_timecode` convert between a label and the count
of frames since 00:00:00:00 in closed form; :func:`frames_to_timecode_naive` counts labels one by
one and is the twin the tests hold them to. The wire carries the label as a string and the rate
as a string (docs/protocol.md §3.1); :func:`parse_timecode` checks both and says what is wrong.
"""

from __future__ import annotations

import logging
import re
from dataclasses import dataclass
from fractions import Fraction

from rigcast.runtime.errors import EXIT_USAGE, RigcastError

log = logging.getLogger(__name__)

RATES: dict[str, Fraction] = {
    "23.976": Fraction(24000, 1001), "24": Fraction(24), "25": Fraction(25),
    "29.97": Fraction(30000, 1001), "30": Fraction(30), "47.952": Fraction(48000, 1001),
    "48": Fraction(48), "50": Fraction(50), "59.94": Fraction(60000, 1001), "60": Fraction(60),
}
DROPPED_PER_MINUTE = {"29.97": 2, "59.94": 4}  # labels skipped per minute in drop-frame
_PATTERN = re.compile(r"^(\d{2}):(\d{2}):(\d{2})([:;.])(\d{2,3})$")


class TimecodeError(RigcastError, ValueError):
    """A timecode or rate that is not valid SMPTE timecode; the message names it."""

    advice = "send HH:MM:SS:FF (HH:MM:SS;FF for drop-frame) with a rate such as 24, 25 or 29.97"
    exit_code = EXIT_USAGE


@dataclass(frozen=True)
class Timecode:
    """One frame's label: hours 0-23, minutes and seconds 0-59, frames below the nominal rate."""

    hours: int
    minutes: int
    seconds: int
    frames: int
    rate: str
    drop_frame: bool = False

    def __str__(self) -> str:
        sep = ";" if self.drop_frame else ":"
        return f"{self.hours:02d}:{self.minutes:02d}:{self.seconds:02d}{sep}{self.frames:02d}"

    @property
    def nominal_fps(self) -> int:
        return nominal_fps(self.rate)

    def to_frames(self) -> int:
        return timecode_to_frames(self)

    def advanced(self, count: int = 1) -> Timecode:
        """The label ``count`` frames later (wrapping at 24 hours)."""
        return frames_to_timecode(self.to_frames() + count, self.rate, self.drop_frame)


def nominal_fps(rate: str) -> int:
    """The frame field's count per second: the rate rounded (30 for 29.97)."""
    return round(RATES[rate])


def frames_per_day(rate: str, drop_frame: bool) -> int:
    fps = nominal_fps(rate)
    drop = DROPPED_PER_MINUTE[rate] if drop_frame else 0
    return 24 * (60 * 60 * fps - 54 * drop)  # 54 of every 60 minutes drop (not 0, 10, ... 50)


def parse_timecode(text: object, rate: object) -> Timecode:
    """A wire timecode and rate -> Timecode; TimecodeError naming what is wrong."""
    if not isinstance(rate, str) or rate not in RATES:
        raise TimecodeError(f"tc_rate {rate!r} is not a timecode rate (one of "
                            f"{', '.join(RATES)})")
    match = _PATTERN.match(text) if isinstance(text, str) else None
    if match is None:
        raise TimecodeError(f"timecode {text!r} is not HH:MM:SS:FF (or HH:MM:SS;FF for "
                            "drop-frame)")
    hh, mm, ss, sep, ff = match.groups()
    tc = Timecode(int(hh), int(mm), int(ss), int(ff), rate, sep != ":")
    check_timecode(tc, text)
    return tc


def check_timecode(tc: Timecode, text: object = None) -> None:
    """TimecodeError when a field is out of range or the label does not exist (drop-frame)."""
    shown = repr(text if text is not None else str(tc))
    fps = nominal_fps(tc.rate)
    for name, value, top in (("hours", tc.hours, 23), ("minutes", tc.minutes, 59),
                             ("seconds", tc.seconds, 59), ("frames", tc.frames, fps - 1)):
        if not 0 <= value <= top:
            raise TimecodeError(f"timecode {shown} at {tc.rate} fps: {name} must be 0-{top}, "
                                f"got {value}")
    if tc.drop_frame:
        drop = DROPPED_PER_MINUTE.get(tc.rate)
        if drop is None:
            raise TimecodeError(f"timecode {shown}: drop-frame (';') exists only at 29.97 and "
                                f"59.94 fps, not {tc.rate}")
        if tc.seconds == 0 and tc.frames < drop and tc.minutes % 10 != 0:
            raise TimecodeError(f"timecode {shown} does not exist in drop-frame: frames 0-"
                                f"{drop - 1} of each minute not divisible by 10 are skipped")


def timecode_to_frames(tc: Timecode) -> int:
    """The count of frames from 00:00:00:00 to ``tc`` (closed form, SMPTE ST 12-1)."""
    fps = nominal_fps(tc.rate)
    minutes = 60 * tc.hours + tc.minutes
    labels = (3600 * tc.hours + 60 * tc.minutes + tc.seconds) * fps + tc.frames
    if not tc.drop_frame:
        return labels
    return labels - DROPPED_PER_MINUTE[tc.rate] * (minutes - minutes // 10)


def frames_to_timecode(count: int, rate: str, drop_frame: bool = False) -> Timecode:
    """The label of frame ``count`` after 00:00:00:00 (wrapping at 24 hours), closed form."""
    fps = nominal_fps(rate)
    n = count % frames_per_day(rate, drop_frame)
    if drop_frame:
        drop = DROPPED_PER_MINUTE[rate]
        per_ten = 600 * fps - 9 * drop  # frames in ten minutes: one full minute, nine short
        per_minute = 60 * fps - drop
        tens, rest = divmod(n, per_ten)
        # Add back the labels skipped before this frame: 9 short minutes per whole ten, then
        # the short minutes begun in this ten (its first minute is full).
        n += 9 * drop * tens + (drop * ((rest - drop) // per_minute) if rest > drop else 0)
    frames = n % fps
    seconds = n // fps
    return Timecode(seconds // 3600, seconds // 60 % 60, seconds % 60, frames, rate, drop_frame)


def frames_to_timecode_naive(count: int, rate: str, drop_frame: bool = False) -> Timecode:
    """Twin of frames_to_timecode: count labels one at a time from midnight, skipping those
    drop-frame skips. O(count); for the tests."""
    fps = nominal_fps(rate)
    drop = DROPPED_PER_MINUTE[rate] if drop_frame else 0
    h = m = s = f = 0
    for _ in range(count % frames_per_day(rate, drop_frame)):
        f += 1
        if f == fps:
            f, s = 0, s + 1
            if s == 60:
                s, m = 0, m + 1
                if m == 60:
                    m, h = 0, h + 1
                if m % 10 != 0:
                    f = drop
    return Timecode(h, m, s, f, rate, drop_frame)
