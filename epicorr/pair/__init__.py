"""Field from a reversed phase-encode EPI pair (Chang & Fitzpatrick 1992 model).

Public API
----------
:func:`estimate_field_from_pair` returns a :class:`PairEstimate` (field in Hz
on the pair's grid in undistorted space, corrected reference, residual,
uncertainty, mask, diagnostics).  Pure functions on arrays and affines.

References
----------
Chang H, Fitzpatrick JM. A technique for accurate magnetic resonance imaging
in the presence of field inhomogeneities. IEEE Trans Med Imaging
1992;11:319-329.

Macdonald J, Ruthotto L. Improved susceptibility artifact correction of
echo-planar MRI using the alternating direction method of multipliers.
J Math Imaging Vis 2018;60:268-282.
"""

from ._estimate import (DEFAULT_BARRIER, DEFAULT_REGULARIZATION, PairEstimate,
                        estimate_field_from_pair)

__all__ = ["estimate_field_from_pair", "PairEstimate", "DEFAULT_REGULARIZATION",
           "DEFAULT_BARRIER"]
