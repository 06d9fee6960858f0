"""Thin Nipype SimpleInterface nodes, one per step, each calling one core function."""
