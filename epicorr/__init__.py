"""epicorr: susceptibility-distortion correction for echo-planar MRI.

Research software, not a medical device.  Results must be checked against an
anatomical reference; clinical use defers to local regulations and licensed
practice.

The package is layered (see DEVELOPERS.md):

* core modules (pure functions on numpy arrays and affines, no file I/O);
* ``epicorr.nodes``: thin Nipype interfaces around one core function each;
* ``epicorr.workflows``: the correction routes, wired from nodes;
* edges: BIDS discovery, the command line, the HTML report.

Importing :mod:`epicorr` never imports nipype, and sets ``NIPYPE_NO_ET=1`` so
that nipype's online version check never runs from our code paths.
"""

import os as _os

# Labs often run offline: nipype's network version check must never run from
# our code paths.  This must happen before nipype is imported anywhere.
_os.environ.setdefault("NIPYPE_NO_ET", "1")

from ._version import __version__  # noqa: E402
from .errors import EpicorrInputError  # noqa: E402

__all__ = ["__version__", "EpicorrInputError"]
