"""BIDS discovery and derivatives naming (an edge of the package)."""
