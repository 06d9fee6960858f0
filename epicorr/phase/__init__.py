"""Field maps from gradient-echo phase data: phase difference, two phases, direct field maps."""
