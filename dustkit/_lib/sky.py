"""Sky geometry shared by the model, features, plotting and the simulator."""

import numpy as np

__all__ = ["separation_deg"]


def separation_deg(l1, b1, l2, b2):
    """Angular separation (deg) between points given in deg, element-wise with broadcasting.

    Notes
    -----
    The haversine formula (Sinnott 1984, Sky & Telescope 68, 159), which stays accurate
    for small separations, where the spherical law of cosines loses precision.
    """
    l1, b1, l2, b2 = (np.deg2rad(np.asarray(x, float)) for x in (l1, b1, l2, b2))
    s = np.sin((b2 - b1) / 2) ** 2 + np.cos(b1) * np.cos(b2) * np.sin((l2 - l1) / 2) ** 2
    return np.rad2deg(2 * np.arcsin(np.sqrt(np.clip(s, 0, 1))))
