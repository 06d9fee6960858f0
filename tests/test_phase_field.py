"""Field maps from gradient-echo phase data (epicorr.phase).

External references named beside each check:
* field = dphi / (2 pi dTE) and complex-domain phase differences (Bernstein,
  King & Zhou, Handbook of MRI Pulse Sequences, 2004, ch. 13);
* gamma-bar = 42.577478 MHz/T (CODATA 2018);
* phase noise ~ 1/SNR per echo at high SNR (Gudbjartsson & Patz 1995);
* FWHM = 2 sqrt(2 ln 2) sigma for a Gaussian (standard formula);
* BIDS specification, "Fieldmap data": EchoTime1/EchoTime2, EchoTime, Units.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from epicorr.errors import EpicorrInputError
from epicorr.phase import (complex_phase_difference, despike, extrapolate_harmonic, field_from_fieldmap,
                           field_from_phasediff, field_from_two_phases, field_sigma_hz, fieldmap_to_hz,
                           head_mask, phase_to_radians, smooth_field, wrap)

GAMMA_BAR = 42.577478e6  # Hz/T, CODATA 2018 (rounded as in the task)
TE1, TE2 = 4.92e-3, 7.38e-3  # s, typical 3 T dual-echo field map (common practice)
DTE = TE2 - TE1


def _phantom(rng, shape=(48, 48, 36), noise=0.03):
    """An ellipsoidal head with a bias field and an air-cavity-like void; two noisy echoes."""
    x, y, z = np.meshgrid(*[np.linspace(-1, 1, s) for s in shape], indexing="ij")
    r2 = (x / 0.8) ** 2 + (y / 0.9) ** 2 + (z / 0.8) ** 2
    head, brain = r2 < 1, r2 < 0.6
    void = x ** 2 + (y - 0.6) ** 2 + (z + 0.3) ** 2 < 0.03
    mag = np.where(head, 1.0 + 0.5 * x, 0.0)
    mag[brain] *= 0.8
    mag[void] = 0.0
    field = 150 * np.exp(-(x ** 2 + (y - 0.6) ** 2 + (z + 0.3) ** 2) / 0.08) + 40 * x - 30 * z + 60 * y * y

    def echo(te, m):
        zc = m * np.exp(1j * (2 * np.pi * field * te + 0.4))
        zc = zc + noise * (rng.normal(size=shape) + 1j * rng.normal(size=shape))
        return np.abs(zc), np.angle(zc)

    m1, p1 = echo(TE1, mag)
    m2, p2 = echo(TE2, 0.9 * mag)
    return dict(field=field, brain=brain & ~void, m1=m1, m2=m2, p1=p1, p2=p2, mag=mag, noise=noise)


# ---------------------------------------------------------------- phase coding

def test_radians_are_detected_and_kept():
    data = np.linspace(-math.pi, math.pi, 1000).reshape(10, 10, 10)
    rad, info = phase_to_radians(data)
    assert info["scaling"] == "radians" and info["detected"]
    np.testing.assert_allclose(np.exp(1j * rad), np.exp(1j * data), atol=1e-12)


def test_zero_to_two_pi_radians_are_detected():
    data = np.linspace(0, 2 * math.pi, 1000).reshape(10, 10, 10)
    rad, info = phase_to_radians(data)
    assert info["scaling"] == "radians"
    np.testing.assert_allclose(np.exp(1j * rad), np.exp(1j * data), atol=1e-12)


def test_signed_integer_coding_spans_two_pi(rng):
    # -4096..4095 spanning 2 pi: phi = v * pi / 4096 (common practice, vendor DICOM phase coding).
    true = rng.uniform(-math.pi, math.pi, (12, 12, 12))
    coded = np.clip(np.round(true / math.pi * 4096), -4096, 4095)
    rad, info = phase_to_radians(coded)
    assert info == {"scaling": "integer", "levels": 8192, "detected": True,
                    "range": (coded.min(), coded.max())}
    assert np.abs(wrap(rad - true)).max() <= math.pi / 4096 + 1e-12


def test_unsigned_integer_coding_spans_two_pi(rng):
    # 0..4095 spanning 2 pi: phi = v * 2 pi / 4096 (common practice).
    true = rng.uniform(0, 2 * math.pi, (12, 12, 12))
    coded = np.clip(np.round(true / (2 * math.pi) * 4096), 0, 4095)
    rad, info = phase_to_radians(coded)
    assert info["levels"] == 4096
    assert np.abs(wrap(rad - true)).max() <= math.pi / 4096 + 1e-12


@pytest.mark.parametrize("data, why", [
    (np.linspace(0, 40, 1000), "floats beyond 2 pi, far below integer coding"),
    (np.linspace(-1000, 1000, 1000), "non-integers over a wide range"),
    (np.tile([0.0, 1.0, 2.0, 3.0], 250), "whole numbers spanning only a few levels"),
])
def test_ambiguous_coding_is_refused(data, why):
    with pytest.raises(EpicorrInputError, match="phasediff.*cannot tell the phase coding") as err:
        phase_to_radians(data.reshape(10, 10, 10), key="phasediff", file="sub-01_phasediff.nii.gz")
    assert "sub-01_phasediff.nii.gz" in str(err.value) and "'integer'" in str(err.value)


def test_explicit_coding_overrides_and_is_checked():
    small = np.tile([0.0, 1.0, 2.0, 3.0], 250).reshape(10, 10, 10)
    rad, info = phase_to_radians(small, scaling="radians")  # whole radians, explicitly
    assert info["scaling"] == "radians" and not info["detected"]
    rad, info = phase_to_radians(small, scaling="integer")
    np.testing.assert_allclose(rad, small * 2 * math.pi / 4096)
    with pytest.raises(EpicorrInputError, match="not radians"):
        phase_to_radians(np.full((4, 4, 4), 100.0), scaling="radians", key="phase1")
    with pytest.raises(EpicorrInputError, match="not a 12-bit integer"):
        phase_to_radians(np.full((4, 4, 4), 0.5), scaling="integer", key="phase1")
    with pytest.raises(EpicorrInputError, match="phase scaling"):
        phase_to_radians(small, scaling="degrees")


# ---------------------------------------------------------------- combination and units

def test_two_phases_are_combined_in_the_complex_domain(rng):
    # Bernstein et al. 2004: dphi = arg(z2 conj z1); subtracting wrapped phases adds 2 pi jumps.
    a = rng.uniform(-3, 3, 5000)
    d = rng.uniform(-2.5, 2.5, 5000)
    p1, p2 = wrap(a), wrap(a + d)
    np.testing.assert_allclose(complex_phase_difference(p1, p2), d, atol=1e-12)
    naive = p2 - p1
    assert np.mean(np.abs(naive - d) > 1) > 0.1  # the naive difference is wrong in many voxels


@pytest.mark.parametrize("units, value, hz", [
    ("Hz", 123.0, 123.0),
    ("rad/s", 2 * math.pi * 50.0, 50.0),       # f = omega / 2 pi
    ("T", 1e-6, 42.577478),                    # f = gamma-bar * dB, CODATA 2018
    ("t", -2e-7, -2e-7 * GAMMA_BAR),
])
def test_direct_field_map_units(units, value, hz):
    out = fieldmap_to_hz(np.full((2, 2, 2), value), units=units)
    np.testing.assert_allclose(out, hz, rtol=1e-12)


def test_unknown_or_missing_units_are_refused():
    with pytest.raises(EpicorrInputError, match=r"sub-01_fieldmap.json: Units='ppm'.*'Hz', 'rad/s', 'T'"):
        fieldmap_to_hz(np.ones((2, 2, 2)), units="ppm", file="sub-01_fieldmap.json")
    with pytest.raises(EpicorrInputError, match="Units"):
        fieldmap_to_hz(np.ones((2, 2, 2)), units=None)


# ---------------------------------------------------------------- uncertainty

def test_sigma_formula_matches_the_high_snr_phase_noise():
    # sigma_f = sqrt(2) / (2 pi dTE SNR) for equal SNRs (Gudbjartsson & Patz 1995).
    s = field_sigma_hz(np.full(3, 50.0), np.full(3, 50.0), delta_te=2.46e-3)
    np.testing.assert_allclose(s, math.sqrt(2) / (2 * math.pi * 2.46e-3 * 50.0))
    # Capped at the standard deviation of a uniform phase, pi / sqrt(3).
    s0 = field_sigma_hz(np.array([0.01]), np.array([0.01]), delta_te=2.46e-3)
    np.testing.assert_allclose(s0, (math.pi / math.sqrt(3)) / (2 * math.pi * 2.46e-3))


def test_sigma_formula_against_monte_carlo(rng):
    snr, n = 40.0, 200000
    z1 = 1 + (rng.normal(size=n) + 1j * rng.normal(size=n)) / snr
    z2 = 1 + (rng.normal(size=n) + 1j * rng.normal(size=n)) / snr
    f = np.angle(z2 * np.conj(z1)) / (2 * math.pi * DTE)
    predicted = field_sigma_hz(np.array([snr]), np.array([snr]), delta_te=DTE)[0]
    assert abs(f.std() / predicted - 1) < 0.02


# ---------------------------------------------------------------- steps

def test_head_mask_is_robust_to_a_bias_field_and_finds_the_noise(rng):
    shape = (40, 40, 32)
    x, y, z = np.meshgrid(*[np.linspace(-1, 1, s) for s in shape], indexing="ij")
    head = (x / 0.8) ** 2 + (y / 0.85) ** 2 + (z / 0.8) ** 2 < 1
    bias = np.exp(1.2 * x)  # a factor of about 7 across the head
    sigma = 0.02
    mag = np.abs(np.where(head, bias, 0) + sigma * (rng.normal(size=shape) + 1j * rng.normal(size=shape)))
    mask, reliable, info = head_mask(mag)
    dice = 2 * (mask & head).sum() / (mask.sum() + head.sum())
    assert dice > 0.97
    assert abs(info["noise_sigma"] / sigma - 1) < 0.05  # Rayleigh background, E[M^2] = 2 sigma^2
    assert reliable.sum() <= mask.sum()


def test_despike_removes_isolated_outliers_only(rng):
    shape = (24, 24, 24)
    x = np.linspace(-1, 1, 24)[:, None, None] * np.ones(shape)
    field = 50 * x + rng.normal(0, 1, shape)
    spiky = field.copy()
    spots = [(5, 5, 5), (12, 14, 9), (20, 3, 17)]
    for s in spots:
        spiky[s] += 400.0  # one cycle of 1/dTE for dTE = 2.5 ms
    out, n = despike(spiky, np.ones(shape, bool), delta_te=2.5e-3)
    assert n == 3
    for s in spots:
        assert abs(out[s] - field[s]) < 10
    untouched = np.ones(shape, bool)
    for s in spots:
        untouched[s] = False
    np.testing.assert_array_equal(out[untouched], spiky[untouched])


def test_harmonic_extension_is_continuous_bounded_and_exact_for_linear_fields():
    shape = (30, 30, 24)
    x, y, z = np.meshgrid(*[np.arange(s, dtype=float) for s in shape], indexing="ij")
    ball = (x - 15) ** 2 + (y - 15) ** 2 + (z - 12) ** 2 < 64
    field = 3.0 * (x - 15) + 1.0
    out, info = extrapolate_harmonic(field, ball)
    np.testing.assert_array_equal(out[ball], field[ball])
    assert out.min() >= field[ball].min() - 1e-6 and out.max() <= field[ball].max() + 1e-6  # maximum principle
    # continuity: no step between neighbours over twice the inside gradient (3 Hz/voxel)
    assert max(np.abs(np.diff(out, axis=a)).max() for a in range(3)) < 2 * 3.0
    assert info["residual"] < 1e-3


def test_smoothing_kernel_has_the_stated_fwhm():
    # FWHM = 2 sqrt(2 ln 2) sigma (standard Gaussian relation).
    delta = np.zeros((41, 41, 41))
    delta[20, 20, 20] = 1.0
    out = smooth_field(delta, fwhm_mm=8.0, zooms=(2.0, 2.0, 2.0))
    profile = out[:, 20, 20] / out[20, 20, 20]
    xs = (np.arange(41) - 20) * 2.0
    inside = xs[profile >= 0.5]
    # half-maximum crossing by linear interpolation on each side
    right = np.interp(0.5, profile[20:][::-1], xs[20:][::-1])
    assert abs(2 * right - 8.0) < 0.1 and inside.max() <= 4.0


# ---------------------------------------------------------------- whole routes

def test_phasediff_route_is_accurate_at_the_noise_limit(rng):
    p = _phantom(rng)
    pd = wrap(p["p2"] - p["p1"])
    est = field_from_phasediff(pd, p["m1"], magnitude2=p["m2"], echo_time1=TE1, echo_time2=TE2)
    err = (est.field_hz - p["field"])[p["brain"]]
    # Expected noise: phase sd sqrt(1/SNR1^2 + 1/SNR2^2) / (2 pi dTE) per voxel.
    expected = field_sigma_hz(p["mag"] / p["noise"], 0.9 * p["mag"] / p["noise"], delta_te=DTE)[p["brain"]]
    rmse = np.sqrt(np.mean(err ** 2))
    assert rmse < 1.15 * np.sqrt(np.mean(expected ** 2)), rmse
    assert abs(np.mean(err)) < 0.3
    # the uncertainty map matches the actual error spread
    assert abs(np.median(est.sigma_hz[p["brain"]]) / np.median(expected) - 1) < 0.1
    assert est.info["phase_coding"]["scaling"] == "radians"
    assert est.mask[p["brain"]].mean() > 0.99
    assert np.all(np.isfinite(est.field_hz)) and np.all(est.sigma_hz > 0)


def test_integer_coding_two_phases_and_phasediff_agree(rng):
    p = _phantom(rng, shape=(40, 40, 30))
    coded1 = np.clip(np.round(p["p1"] / math.pi * 4096), -4096, 4095)
    coded2 = np.clip(np.round(p["p2"] / math.pi * 4096), -4096, 4095)
    two = field_from_two_phases(coded1, coded2, p["m1"], p["m2"], echo_time1=TE1, echo_time2=TE2)
    assert two.info["phase_coding"]["phase1"]["scaling"] == "integer"
    pd = np.clip(np.round(wrap(p["p2"] - p["p1"]) / math.pi * 4096), -4096, 4095)
    diff = field_from_phasediff(pd, np.stack([p["m1"], p["m2"]], axis=-1), echo_time1=TE1, echo_time2=TE2)
    b = p["brain"]
    # quantisation of 2 pi / 8192 rad is 0.03 Hz at dTE 2.46 ms
    assert np.sqrt(np.mean((two.field_hz - diff.field_hz)[b] ** 2)) < 0.2
    assert np.sqrt(np.mean((two.field_hz - p["field"])[b] ** 2)) < 5.0


def test_fieldmap_route_converts_units_and_keeps_values(rng):
    p = _phantom(rng, shape=(40, 40, 30))
    est = field_from_fieldmap(2 * math.pi * p["field"], p["m1"], units="rad/s")
    np.testing.assert_allclose(est.field_hz[est.mask], p["field"][est.mask], atol=1e-9)
    assert est.info["units"] == "rad/s"
    assert np.all(np.isfinite(est.sigma_hz))


def test_optional_smoothing_reduces_noise_and_is_recorded(rng):
    p = _phantom(rng, shape=(40, 40, 30), noise=0.06)
    pd = wrap(p["p2"] - p["p1"])
    raw = field_from_phasediff(pd, p["m1"], echo_time1=TE1, echo_time2=TE2)
    smooth = field_from_phasediff(pd, p["m1"], echo_time1=TE1, echo_time2=TE2, smoothing_fwhm_mm=4.0,
                                  zooms=(4.0, 4.0, 4.0))
    b = p["brain"]
    e_raw = np.sqrt(np.mean((raw.field_hz - p["field"])[b] ** 2))
    e_smooth = np.sqrt(np.mean((smooth.field_hz - p["field"])[b] ** 2))
    assert e_smooth < 0.8 * e_raw
    assert smooth.info["smoothing"] == "3-D Gaussian, FWHM 4 mm"


# ---------------------------------------------------------------- bad input

def _inputs(rng):
    p = _phantom(rng, shape=(24, 24, 20))
    return wrap(p["p2"] - p["p1"]), p["m1"]


def test_missing_echo_time2_names_the_key_and_file(rng):
    pd, mag = _inputs(rng)
    with pytest.raises(EpicorrInputError, match=r"^sub-01_phasediff.json: EchoTime2: missing") as err:
        field_from_phasediff(pd, mag, echo_time1=TE1, echo_time2=None, file="sub-01_phasediff.json")
    assert err.value.key == "EchoTime2"


def test_equal_echo_times_are_refused(rng):
    pd, mag = _inputs(rng)
    with pytest.raises(EpicorrInputError, match=r"EchoTime2=0\.00492: equals EchoTime1"):
        field_from_phasediff(pd, mag, echo_time1=TE1, echo_time2=TE1)
    with pytest.raises(EpicorrInputError, match=r"phase2.json: EchoTime=.*equals"):
        field_from_two_phases(pd, pd, mag, mag, echo_time1=TE1, echo_time2=TE1,
                              file={"phase1": "phase1.json", "phase2": "phase2.json"})


def test_echo_times_in_milliseconds_are_refused(rng):
    pd, mag = _inputs(rng)
    with pytest.raises(EpicorrInputError, match="EchoTime1=4.92: over 0.2 s"):
        field_from_phasediff(pd, mag, echo_time1=4.92, echo_time2=7.38)


def test_shape_mismatch_names_the_magnitude(rng):
    pd, mag = _inputs(rng)
    with pytest.raises(EpicorrInputError, match=r"sub-01_magnitude1.nii.gz: magnitude1=\(24, 24, 19\)") as err:
        field_from_phasediff(pd, mag[..., :-1], echo_time1=TE1, echo_time2=TE2,
                             file={"phasediff": "sub-01_phasediff.nii.gz",
                                   "magnitude1": "sub-01_magnitude1.nii.gz"})
    assert "differs from the phasediff shape" in str(err.value)


def test_phase_full_of_zeros_is_refused(rng):
    pd, mag = _inputs(rng)
    with pytest.raises(EpicorrInputError, match=r"sub-01_phasediff.nii.gz: phasediff: phase image is all zeros"):
        field_from_phasediff(np.zeros_like(pd), mag, echo_time1=TE1, echo_time2=TE2,
                             file="sub-01_phasediff.nii.gz")


def test_unknown_units_in_the_fieldmap_route_and_with_file(rng):
    pd, mag = _inputs(rng)
    with pytest.raises(EpicorrInputError) as err:
        field_from_fieldmap(pd, mag, units="gauss")
    named = err.value.with_file("sub-01_fieldmap.json")
    assert str(named).startswith("sub-01_fieldmap.json: Units='gauss'")
