"""Synthetic inputs for the QC report tests: an invented head on a small grid.

Nothing here comes from real data: an ellipsoid "brain" with a darker core,
a smooth field with a positive lobe behind the "sinus" and a negative one at a
"temporal pole", and EPI images distorted by resampling along phase encoding.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from epicorr.geometry import PEDirection
from epicorr.qcmetrics import target_metrics
from epicorr.report import AcquisitionParam, SubjectReport, TargetReport

SHAPE = (32, 40, 30)
VOXEL = (3.0, 3.0, 3.5)
EES = 0.00055  # s, invented
N_PE = SHAPE[1]


def head(rng, shape=SHAPE):
    i, j, k = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape], indexing="ij")
    r = (i / 0.8) ** 2 + (j / 0.85) ** 2 + (k / 0.75) ** 2
    brain = r < 1.0
    img = np.where(brain, 800.0, 0.0)
    img = np.where(r < 0.35, 450.0, img)  # darker core
    img = np.where((r >= 1.0) & (r < 1.15), 1000.0, img)  # bright rim ("scalp")
    img = ndimage.gaussian_filter(img, 0.8) + rng.normal(0, 8, shape)
    return np.clip(img, 0, None), brain


def field(shape=SHAPE, scale=1.0):
    i, j, k = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape], indexing="ij")
    lobe1 = 160.0 * np.exp(-((i / 0.3) ** 2 + ((j - 0.7) / 0.25) ** 2 + ((k + 0.35) / 0.25) ** 2))
    lobe2 = -90.0 * np.exp(-(((i - 0.6) / 0.2) ** 2 + ((j - 0.1) / 0.3) ** 2 + ((k + 0.4) / 0.25) ** 2))
    return scale * (lobe1 + lobe2 + 5.0 * j)


def distort(img, disp, axis=1):
    """Pull-back: the distorted image at y' samples the truth at y' - d (small-d approximation)."""
    grid = np.indices(img.shape, dtype=float)
    grid[axis] -= disp
    return ndimage.map_coordinates(img, grid, order=1, mode="constant")


def target(rng, name="task-rest_bold", scale=1.0, pair=True, extras=True):
    truth, brain = head(rng)
    pe = PEDirection(1, -1)
    fld = field(scale=scale)
    disp = pe.polarity * fld * EES * N_PE
    before = distort(truth, disp)
    after = truth + rng.normal(0, 10 * scale, truth.shape)
    drop = brain & (fld > 60.0)
    retained = np.clip(1.0 - np.abs(fld) / 250.0, 0, 1)
    pb = pa = None
    if pair:
        pb = (distort(truth, disp), distort(truth, -disp))
        pa = (truth + rng.normal(0, 10, truth.shape), truth + rng.normal(0, 10 * scale, truth.shape))
    metrics = target_metrics(field_hz=fld, displacement_vox=disp, brain_mask=brain,
                             voxel_size_mm=VOXEL, pe_axis=pe.axis, dropout_mask=drop,
                             pair_before=pb, pair_after=pa,
                             registration_quality=None if pair else 0.8 / scale,
                             runtime_s=40.0 * scale)
    affine = np.diag(list(VOXEL) + [1.0])
    return TargetReport(
        name=name, method="reversed phase-encode pair" if pair else "dual-echo phase difference",
        pe=pe, voxel_size_mm=VOXEL, reference_before=before, reference_after=after,
        field_hz=fld, displacement_vox=disp, metrics=metrics, brain_mask=brain, affine=affine,
        edges=truth, edges_label="anatomical reference (synthetic)",
        dropout_mask=drop if extras else None, retained_signal=retained if extras else None,
        uncertainty=(2.0 + np.abs(np.gradient(fld, axis=1))) if extras else None,
        pair_before=pb, pair_after=pa, pair_labels=("j", "j-"),
        acquisition=[
            AcquisitionParam("Phase-encode direction", "j- (axis j, polarity −1)",
                             "sidecar PhaseEncodingDirection"),
            AcquisitionParam("Effective echo spacing", f"{EES * 1e3:.3f} ms",
                             "sidecar EffectiveEchoSpacing"),
            AcquisitionParam("Total readout time", f"{EES * (N_PE - 1) * 1e3:.2f} ms",
                             "derived: EffectiveEchoSpacing × (N − 1)"),
            AcquisitionParam("PE lines N", str(N_PE), "fallback: image size along j"),
        ],
        runtime_s=40.0 * scale,
        notes=[] if scale <= 1 else ["Large field: check the frontal lobe closely."])


def subject(rng, label="01", scale=1.0, n_targets=1, pair=True):
    """A subject; targets after the first lack the optional figures (keeps tests fast)."""
    targets = [target(rng, name=f"task-rest_run-{n + 1}_bold", scale=scale, pair=pair,
                      extras=n == 0) for n in range(n_targets)]
    return SubjectReport(subject=label, targets=targets,
                         command_line="epicorr run /data/study /data/study/derivatives/epicorr "
                                      "--participant-label " + label,
                         created="2026-12-01 12:00 UTC")
