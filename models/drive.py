"""The drive of a switching stage: a logic output as a Thevenin source.

A study's ``[drive]`` table gives the logic-high and logic-low levels of the driving output (as
ranges of the logic family, or toleranced values) and its source resistance; the stage puts the
source resistance in series with its base resistor. Parameters: ``drive.high``, ``drive.low``
[V] and ``drive.source_resistance`` [ohm] (default 0, a stiff output). Fixed figures: the PWM
``frequency`` [Hz] (absent: static on), ``duty`` (default 0.5 with a frequency) and the drive's
``edge_time`` [s] (10 % to 90 %, default 10 ns).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tolerance.study import Reader

__all__ = ["DriveSpec", "read_drive"]


@dataclass(frozen=True)
class DriveSpec:
    """Names of the drive's parameters.

    Attributes
    ----------
    high, low, source_resistance : str
        Parameter names of the logic-high level [V], the logic-low level [V] and the source
        resistance [ohm].
    """

    high: str = "drive.high"
    low: str = "drive.low"
    source_resistance: str = "drive.source_resistance"
    frequency: float | None = None
    duty: float = 1.0
    edge_time: float = 10e-9

    @property
    def pwm(self) -> bool:
        """True for a switched (PWM) drive, False for static on."""
        return self.frequency is not None

    def levels(self, samples: dict[str, np.ndarray]):
        """(high [V], low [V], source resistance [ohm]) arrays of a chunk."""
        return (np.asarray(samples[self.high], dtype=float),
                np.asarray(samples[self.low], dtype=float),
                np.asarray(samples[self.source_resistance], dtype=float))


def read_drive(reader: Reader) -> DriveSpec:
    """Read ``[drive]`` (``reader`` is the study's top-level reader).

    Raises
    ------
    StudyError
        For a missing or malformed level, or a low level that is not below the high level.
    """
    drive = reader.table("drive", required=True)
    high = drive.parameter("high", "V", "drive.high", "logic-high level of the drive")
    low = drive.parameter("low", "V", "drive.low", "logic-low level of the drive",
                          default=0.0)
    drive.parameter("source_resistance", "ohm", "drive.source_resistance",
                    "source resistance of the drive output", default=0.0, minimum=0.0)
    if not low.high < high.low:
        raise drive.error("low", f"the logic-low range (up to {low.high:g} V) must lie below the "
                                 f"logic-high range (from {high.low:g} V)")
    if high.low <= 0:
        raise drive.error("high", "the logic-high level must be positive")
    frequency = drive.optional_quantity("frequency", "Hz", positive=True, maximum=10e6)
    duty = drive.quantity("duty", "1", default=0.5 if frequency else 1.0, minimum=0.0,
                          maximum=1.0)
    if frequency is None and drive.has("duty"):
        raise drive.error("duty", "needs a PWM frequency (drive.frequency)")
    if frequency is not None and not 0 < duty < 1:
        raise drive.error("duty", f"a PWM duty lies strictly between 0 and 1, got {duty:g}")
    edge = drive.quantity("edge_time", "s", default=10e-9, positive=True, maximum=1e-3)
    if frequency is not None and edge * frequency > 0.05:
        raise drive.error("edge_time", "the drive edges take more than 5 % of the PWM period")
    return DriveSpec(frequency=frequency, duty=duty, edge_time=edge)
