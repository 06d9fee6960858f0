"""QC metrics on arrays with known answers, and the status thresholds."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from epicorr.errors import EpicorrInputError
from epicorr.qcmetrics import (THRESHOLDS, EXPLANATIONS, brain_correlation, displacement_summary,
                               dropout_volume_ml, field_summary, foldover_count, pe_jacobian,
                               status, target_metrics, worst_status)


def test_field_summary_matches_numpy_percentiles(rng):
    # Reference: numpy.percentile (linear interpolation, general-purpose library).
    fld = rng.normal(0, 40, (20, 22, 18))
    mask = np.zeros(fld.shape, bool)
    mask[3:17, 4:18, 2:15] = True
    out = field_summary(fld, mask=mask)
    vals = fld[mask]
    assert out["min_hz"] == vals.min() and out["max_hz"] == vals.max()
    for p in (1, 5, 50, 95, 99):
        assert out[f"p{p}_hz"] == pytest.approx(np.percentile(vals, p))
    assert out["abs_p99_hz"] == pytest.approx(np.percentile(np.abs(vals), 99))


def test_displacement_shares_on_a_ramp():
    # A ramp of 100 distinct values -4.95 ... 4.95 (step 0.1): |d| > 1 for 80 of them,
    # |d| > 3 for 40 (count by hand: 1.05..4.95 is 40 values on each side).
    d = (np.arange(100, dtype=float) - 49.5) / 10.0
    vol = np.tile(d, (2, 3, 1)).transpose(0, 2, 1)  # shape (2, 100, 3)
    out = displacement_summary(vol, voxel_size_mm=2.5)
    assert out["share_over_1vox"] == pytest.approx(0.80)
    assert out["share_over_3vox"] == pytest.approx(0.40)
    assert out["abs_max_vox"] == pytest.approx(4.95)
    assert out["abs_max_mm"] == pytest.approx(4.95 * 2.5)
    assert out["p50_vox"] == pytest.approx(0.0, abs=1e-12)
    assert out["abs_p99_mm"] == pytest.approx(out["abs_p99_vox"] * 2.5)


def test_jacobian_of_linear_displacement_is_one_plus_slope():
    # d(y) = a*y maps y -> (1 + a) y: the Jacobian is exactly 1 + a (analytic derivative).
    y = np.arange(30, dtype=float)
    for a, folds in ((0.4, 0), (-0.5, 0), (-1.0, 30 * 4 * 5), (-2.0, 30 * 4 * 5)):
        d = np.broadcast_to((a * y)[None, :, None], (4, 30, 5)).copy()
        jac = pe_jacobian(d, pe_axis=1)
        assert np.allclose(jac, 1 + a)
        assert foldover_count(jac) == folds


def test_foldover_count_on_a_sinusoid():
    # d = A sin(2 pi y / L): J = 1 + (2 pi A / L) cos(2 pi y / L) <= 0 where
    # cos <= -L / (2 pi A) (analytic).  Central differences scale the slope by
    # sin(w)/w (w = 2 pi / L), so compare on grid points clear of the boundary.
    L, A = 40.0, 12.0
    y = np.arange(200, dtype=float)
    d = np.broadcast_to((A * np.sin(2 * np.pi * y / L))[None, :, None], (3, 200, 2)).copy()
    jac = pe_jacobian(d, pe_axis=1)
    exact = 1 + (2 * np.pi * A / L) * np.cos(2 * np.pi * y / L)
    clear = np.abs(exact) > 0.1
    inner = (y > 0) & (y < 199)
    assert np.array_equal((jac[0, :, 0] <= 0)[clear & inner], (exact <= 0)[clear & inner])
    assert foldover_count(jac) == int(np.count_nonzero(jac <= 0))
    mask = np.zeros(d.shape, bool)
    mask[0] = True
    assert foldover_count(jac, mask=mask) == int(np.count_nonzero(jac[0] <= 0))


def test_dropout_volume_in_millilitres():
    # 1 mL = 1 cm^3 = 1000 mm^3 (SI).  40 voxels of 2 x 2 x 2.5 mm = 400 mm^3 = 0.4 mL.
    m = np.zeros((10, 10, 10), bool)
    m[2:4, 2:6, 2:7] = True
    assert dropout_volume_ml(m, voxel_volume_mm3=10.0) == pytest.approx(0.4)
    brain = np.zeros_like(m)
    brain[2:3] = True
    assert dropout_volume_ml(m, voxel_volume_mm3=10.0, mask=brain) == pytest.approx(0.2)


def test_brain_correlation_matches_scipy(rng):
    # Reference: scipy.stats.pearsonr.
    a = rng.normal(size=(12, 12, 12))
    b = 0.7 * a + rng.normal(size=a.shape)
    mask = rng.random(a.shape) > 0.3
    assert brain_correlation(a, b, mask=mask) == pytest.approx(stats.pearsonr(a[mask], b[mask])[0])
    assert math.isnan(brain_correlation(np.ones_like(a), b))
    with pytest.raises(EpicorrInputError):
        brain_correlation(a, b[:-1])


@pytest.mark.parametrize("key", sorted(THRESHOLDS))
def test_status_boundaries(key):
    t = THRESHOLDS[key]
    sign = 1 if t.higher_is_worse else -1
    eps = 1e-9 + 1e-6 * abs(t.problem - t.look)
    assert status(key, t.look - sign * eps) == "fine"
    assert status(key, t.look) == "look"
    assert status(key, t.problem - sign * eps) == "look"
    assert status(key, t.problem) == "problem"
    assert status(key, t.problem + sign * 1e3) == "problem"
    assert status(key, float("nan")) == "problem"
    assert t.source.strip()  # every threshold documents where it comes from
    assert EXPLANATIONS[key]


def test_status_rejects_unknown_metric():
    with pytest.raises(EpicorrInputError, match="no QC threshold"):
        status("not_a_metric", 1.0)


def test_worst_status():
    assert worst_status(["fine", None, "look"]) == "look"
    assert worst_status(["look", "problem", "fine"]) == "problem"
    assert worst_status([None]) == "fine"


def test_target_metrics_known_volume():
    shape = (16, 20, 12)
    y = np.arange(shape[1], dtype=float)
    # Field a linear ramp in Hz; voxels_per_hz = 0.02 -> displacement = 0.02 * field.
    fld = np.broadcast_to((10.0 * (y - 10.0))[None, :, None], shape).copy()  # -100 .. 90 Hz
    disp = 0.02 * fld  # -2 .. 1.8 voxels, slope 0.2 voxel/voxel -> J = 1.2, no fold-over
    drop = np.zeros(shape, bool)
    drop[:, :2, :] = True  # 16*2*12 = 384 voxels of 2*3*4 = 24 mm^3 -> 9.216 mL
    pa = (fld + 1.0, fld + 2.0)
    pb = (fld, -fld)
    out = {m.key: m for m in target_metrics(field_hz=fld, displacement_vox=disp, brain_mask=None,
                                            voxel_size_mm=(2.0, 3.0, 4.0), pe_axis=1,
                                            dropout_mask=drop, pair_before=pb, pair_after=pa,
                                            registration_quality=0.2, runtime_s=12.0)}
    assert out["field_abs_p99_hz"].value == pytest.approx(np.percentile(np.abs(fld), 99))
    assert out["field_abs_p99_hz"].status == "fine"
    assert out["foldover_voxels"].value == 0
    assert out["dropout_ml"].value == pytest.approx(9.216)
    assert out["dropout_ml"].status == "look"
    assert out["pair_corr_after"].value == pytest.approx(1.0)
    assert out["pair_corr_gain"].value == pytest.approx(2.0)  # from -1 to +1
    assert out["registration_quality"].status == "problem"
    assert out["runtime_s"].status == "fine"
    # |d| > 1 where |y - 10| > 5: y = 0..4 and 16..19 -> 9 of 20 rows.
    assert out["share_over_1vox"].value == pytest.approx(9 / 20)
    assert out["share_over_1vox"].display_value == "45.0 %"
    # mm detail uses the PE-axis voxel size (3 mm).
    assert "PE voxel 3 mm" in out["disp_abs_p99_vox"].detail
    assert all(m.explanation for m in out.values())


def test_target_metrics_flags_foldover_and_omits_missing_inputs():
    shape = (8, 30, 6)
    y = np.arange(shape[1], dtype=float)
    disp = np.broadcast_to((-1.5 * y)[None, :, None], shape).copy()  # J = -0.5 everywhere
    fld = disp / 0.02
    ms = target_metrics(field_hz=fld, displacement_vox=disp, brain_mask=np.ones(shape, bool),
                        voxel_size_mm=(2, 2, 2), pe_axis=1)
    keys = [m.key for m in ms]
    assert "dropout_ml" not in keys and "pair_corr_after" not in keys and "runtime_s" not in keys
    fold = next(m for m in ms if m.key == "foldover_voxels")
    assert fold.value == 8 * 30 * 6 and fold.status == "problem"


def test_target_metrics_rejects_bad_inputs():
    z = np.zeros((4, 4, 4))
    with pytest.raises(EpicorrInputError, match="voxel_size_mm"):
        target_metrics(field_hz=z, displacement_vox=z, brain_mask=None, voxel_size_mm=(1, 0, 1),
                       pe_axis=1)
    with pytest.raises(EpicorrInputError, match="brain mask is empty"):
        target_metrics(field_hz=z, displacement_vox=z, brain_mask=np.zeros_like(z, bool),
                       voxel_size_mm=(1, 1, 1), pe_axis=1)
    with pytest.raises(EpicorrInputError, match="brain_mask"):
        target_metrics(field_hz=z, displacement_vox=z, brain_mask=np.zeros((3, 3, 3), bool),
                       voxel_size_mm=(1, 1, 1), pe_axis=1)


def test_metric_round_trips_through_json_rows():
    # The QC node stores dataclasses.asdict rows in JSON, with None for non-finite values.
    import dataclasses
    import json

    shape = (6, 8, 5)
    fld = np.full(shape, 20.0)
    ms = target_metrics(field_hz=fld, displacement_vox=fld * 0.01, brain_mask=None,
                        voxel_size_mm=(2, 2, 2), pe_axis=1, runtime_s=3.0)
    rows = json.loads(json.dumps([dataclasses.asdict(m) for m in ms]))
    back = [type(ms[0]).from_dict(r) for r in rows]
    assert back == ms
    rows[0]["value"] = None
    m = type(ms[0]).from_dict(rows[0])
    assert math.isnan(m.value) and m.display_value == "n/a"


def test_pair_agreement_measured_on_the_pair_grid_is_reported_for_another_target():
    """A BOLD corrected with a pair's field: the estimator's own before/after agreement is shown,
    with its status from the same thresholds as the images' correlation (pure pass-through)."""
    shape = (8, 10, 6)
    zero = np.zeros(shape)
    out = {m.key: m for m in target_metrics(field_hz=zero, displacement_vox=zero, brain_mask=None,
                                            voxel_size_mm=(2, 2, 2), pe_axis=1,
                                            pair_agreement=(0.42, 0.95))}
    assert out["pair_corr_after"].value == pytest.approx(0.95)
    assert out["pair_corr_gain"].value == pytest.approx(0.53)
    assert "pair's own grid" in out["pair_corr_after"].detail
    ref = {m.key: m for m in target_metrics(field_hz=zero, displacement_vox=zero, brain_mask=None,
                                            voxel_size_mm=(2, 2, 2), pe_axis=1,
                                            pair_before=(zero + np.arange(10.0)[None, :, None],
                                                         -np.arange(10.0)[None, :, None] + zero),
                                            pair_after=(zero + np.arange(10.0)[None, :, None],
                                                        zero + np.arange(10.0)[None, :, None]))}
    assert ref["pair_corr_after"].value == pytest.approx(1.0)
    assert ref["pair_corr_gain"].value == pytest.approx(2.0)
