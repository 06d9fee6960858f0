"""Physics simulator: synthetic head, Fourier dipole field, k-space EPI and dual-echo GRE (pure functions)."""
