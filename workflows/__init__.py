"""Nipype workflows wiring epicorr's nodes into the correction routes.

This folder sits at the top of the repository and ships as the subpackage
``epicorr.workflows`` (``package-dir`` in pyproject.toml).  Import it as
``from epicorr.workflows import ...``.
"""

__all__: list[str] = []
