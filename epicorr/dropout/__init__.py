"""Residual signal dropout: predicted retained signal from the field and the EPI protocol."""
