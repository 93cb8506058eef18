"""Rules that warn a reader about a selection, as plain text (pure computation: no widgets, no files).

`storage_resolution_warning`: satellite-gravimetry storage products resolve storage change only over large
areas; below about `GRAVIMETRY_MIN_KM2` their basin mean is mostly signal leaked in from around the basin
(rule of thumb, e.g. Longuevergne et al. 2010, Water Resources Research).
"""

from __future__ import annotations

import math

__all__ = ["GRAVIMETRY_MIN_KM2", "storage_resolution_warning"]

GRAVIMETRY_MIN_KM2 = 200_000  # km2: rule of thumb for satellite-gravimetry storage (e.g. Longuevergne et al. 2010)


def storage_resolution_warning(area_km2: float) -> str | None:
    """The warning for a balance unit too small for gravimetric storage, or None.

    Parameters
    ----------
    area_km2 : float
        Area of the balance unit (km2). NaN (unknown) gives no warning.

    Returns
    -------
    str or None
        One sentence naming the area (km2) and the threshold, or None at or above `GRAVIMETRY_MIN_KM2`.
    """
    if area_km2 is None or not math.isfinite(area_km2) or area_km2 >= GRAVIMETRY_MIN_KM2:
        return None
    return (f"Basin area {area_km2:,.0f} km2 is below the ~{GRAVIMETRY_MIN_KM2:,} km2 that satellite-gravimetry "
            "storage resolves (rule of thumb, e.g. Longuevergne et al. 2010): treat dS with care.")
