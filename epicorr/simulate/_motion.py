"""Small rigid head motion between acquisitions.

The head moves in the scanner; the imaging grid stays.  A moved head is the
same analytic head evaluated with a new pose, so its susceptibility map (and
hence its field, which must be recomputed: B0 stays along scanner z) and its
images follow the motion exactly, without interpolation.

References
----------
Friston KJ, Williams S, Howard R, Frackowiak RS, Turner R. Movement-related
effects in fMRI time-series. Magn Reson Med 1996;35:346-355 (rigid-body
description of head motion: three rotations and three translations).
"""

from __future__ import annotations

import numpy as np

from ._head import Head, rigid_matrix

__all__ = ["motion_matrix", "rigid_motion"]


def motion_matrix(*, rotation_deg=(0.0, 0.0, 0.0), translation_mm=(0.0, 0.0, 0.0),
                  center_mm=(0.0, 0.0, 0.0)) -> np.ndarray:
    """4 x 4 world-space rigid motion: rotate about ``center_mm`` (x, then y, then z), then translate.

    Parameters
    ----------
    rotation_deg : 3 floats
        Degrees about world x, y, z.
    translation_mm : 3 floats
    center_mm : 3 floats
        Centre of rotation, world mm.

    Returns
    -------
    (4, 4) ndarray
    """
    c = np.eye(4)
    c[:3, 3] = np.asarray(center_mm, float)
    return rigid_matrix(translation_mm=translation_mm) @ c @ rigid_matrix(rotation_deg=rotation_deg) \
        @ np.linalg.inv(c)


def rigid_motion(head: Head, *, rotation_deg=(0.0, 0.0, 0.0), translation_mm=(0.0, 0.0, 0.0),
                 center_mm=(0.0, 0.0, 0.0)) -> Head:
    """The head after a small rigid motion, on the same grid.

    Parameters
    ----------
    head : Head
    rotation_deg, translation_mm, center_mm
        See :func:`motion_matrix`.

    Returns
    -------
    Head
        Re-evaluated with pose ``motion @ head.pose``; recompute its field with
        :func:`dipole_field_hz`.
    """
    return head.moved(motion_matrix(rotation_deg=rotation_deg, translation_mm=translation_mm,
                                    center_mm=center_mm))
