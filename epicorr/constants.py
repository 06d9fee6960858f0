"""Physical constants used across the package (SI units)."""

#: Proton gyromagnetic ratio over 2 pi, in Hz/T (CODATA 2018: 42.577 478 518 MHz/T).
GAMMA_BAR_HZ_PER_T = 42.577478e6

__all__ = ["GAMMA_BAR_HZ_PER_T"]
