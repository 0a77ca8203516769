"""Slice geometry: the positions of a stack's slices must make one evenly spaced volume.

A DICOM series with missing or duplicated slices, or a slice folder with a gap in its numbering,
would otherwise be read as contiguous and put a wrong z spacing into the corpus.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np

from ..errors import VolumeReadError

__all__ = ["check_slice_steps", "STEP_TOLERANCE"]

STEP_TOLERANCE = 0.05  # relative: a step more than 5 % off the median step is a gap (common practice: a few %)


def check_slice_steps(positions: Sequence[float], where: str, unit: str, names: Sequence[str] | None = None) -> None:
    """Refuse slice positions that do not make one evenly spaced volume.

    Parameters
    ----------
    positions : sequence of float
        Sorted slice positions along the stacking axis.
    where : str
        The folder, for the message.
    unit : str
        Unit of the positions (``"mm"``, or ``""`` for slice numbers).
    names : sequence of str, optional
        The slice files in the same order, to name the ones around a gap.

    Raises
    ------
    VolumeReadError
        Two slices at one position, or a step that differs from the others (slices missing):
        read as contiguous, either would put a wrong z spacing into the corpus.

    Examples
    --------
    >>> check_slice_steps([0.0, 2.5, 5.0, 7.5], "s", "mm")
    >>> check_slice_steps([0.0, 2.5, 10.0, 12.5], "s", "mm")
    Traceback (most recent call last):
    ...
    warmstart.errors.VolumeReadError: s: slices missing between positions 2.5 and 10 mm (a step of 7.5 where the others are 2.5); the series is not one evenly spaced volume
    """
    pos = np.asarray(positions, dtype=float)
    if len(pos) < 2:
        return
    steps = np.diff(pos)
    median = float(np.median(steps))
    label = (lambda i: f" ({names[i]})") if names else (lambda i: "")
    same = np.flatnonzero(np.abs(steps) <= 1e-6 * max(1.0, abs(median)))
    if len(same):
        i = int(same[0])
        raise VolumeReadError(f"{where}: two slices at one position {pos[i]:g} {unit}{label(i)}{label(i + 1)}; the series "
                              "is not a single volume (a duplicate, or two series with one UID)".replace("  ", " "))
    off = np.flatnonzero(np.abs(steps - median) > STEP_TOLERANCE * abs(median))
    if len(off):
        i = int(off[0])
        raise VolumeReadError(f"{where}: slices missing between positions {pos[i]:g} and {pos[i + 1]:g} {unit}"
                              f"{label(i)}{label(i + 1)} (a step of {steps[i]:g} where the others are {median:g}); "
                              "the series is not one evenly spaced volume".replace(" )", ")").replace("  ", " "))
