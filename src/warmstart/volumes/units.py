"""Length units to micrometres, for voxel sizes read from file metadata."""
from __future__ import annotations

__all__ = ["to_micrometres"]

# Spellings seen in OME-XML (UnitsLength), OME-NGFF / UDUNITS-2 axis units, ImageJ and MRC.
_UM_PER_UNIT = {
    "pm": 1e-6, "picometer": 1e-6, "picometre": 1e-6,
    "å": 1e-4, "a": 1e-4, "angstrom": 1e-4, "ångström": 1e-4,
    "nm": 1e-3, "nanometer": 1e-3, "nanometre": 1e-3,
    "µm": 1.0, "μm": 1.0, "um": 1.0, "micron": 1.0, "microns": 1.0, "micrometer": 1.0, "micrometre": 1.0,
    "\\u00b5m": 1.0,
    "mm": 1e3, "millimeter": 1e3, "millimetre": 1e3,
    "cm": 1e4, "centimeter": 1e4, "centimetre": 1e4,
    "m": 1e6, "meter": 1e6, "metre": 1e6,
    "inch": 25400.0, "in": 25400.0,
}


def to_micrometres(value: float | None, unit: str | None) -> float | None:
    """Convert a length to micrometres.

    Parameters
    ----------
    value : float or None
        The length in ``unit``.
    unit : str or None
        Unit spelling (case-insensitive); ``None`` is read as micrometres, which is the default of
        OME-XML and the most common unit of microscopy metadata.

    Returns
    -------
    float or None
        The length in µm, or ``None`` when the value is missing, non-positive or the unit is not a
        length (``pixel``, for instance).

    Examples
    --------
    >>> to_micrometres(250, "nm"), to_micrometres(0.5, "millimeter"), to_micrometres(3, "pixel")
    (0.25, 500.0, None)
    """
    if value is None:
        return None
    try:
        value = float(value)
    except (TypeError, ValueError):
        return None
    if not value > 0:
        return None
    key = "um" if unit is None else str(unit).strip().lower()
    factor = _UM_PER_UNIT.get(key)
    return None if factor is None else value * factor
