"""k-space EPI simulation against Jezzard & Balaban's shift and the through-plane sinc law.

Sources:
* Jezzard P, Balaban RS, Magn Reson Med 1995;34:65: a uniform off-resonance df shifts the
  image along PE by df * EES * N voxels, towards increasing index for polarity +1 (the
  package convention, epicorr/geometry.py, which follows BIDS PhaseEncodingDirection).
* Through-plane dephasing with a linear field gradient G (Hz/mm) across a rectangular slice
  of thickness dz (mm) at echo time TE: |sinc(G dz TE)|, sinc(x) = sin(pi x)/(pi x), first
  zero at G dz TE = 1 cycle (e.g. Haacke et al., Magnetic Resonance Imaging: Physical
  Principles and Sequence Design, 1999, ch. 20; from memory).
"""

import numpy as np
import pytest

from epicorr.geometry import PEDirection
from epicorr.simulate import line_times, simulate_epi, true_retained_signal


def _point(shape=(6, 64, 4), at=(3, 20, 2)):
    rho = np.zeros(shape)
    rho[at] = 1.0
    return rho


@pytest.mark.parametrize("code", ["j", "j-"])
def test_uniform_offset_shifts_point_by_jezzard_balaban(code):
    n, df = 64, 100.0
    ees = 3.0 / (df * n)                       # 100 Hz * EES * N = 3 voxels
    img = simulate_epi(_point(), np.full((6, n, 4), df), pe=code, effective_echo_spacing=ees,
                       echo_time=0.03)
    pol = 1 if code == "j" else -1
    col = img[3, :, 2]
    assert int(np.argmax(col)) == 20 + pol * 3
    assert col.max() == pytest.approx(1.0, abs=1e-4)   # integer shift of an impulse: exact
    assert np.sum(col) - col.max() < 1e-3


def test_fractional_shift_and_other_axes():
    # 2.5 voxels: the impulse lands half-way, the two neighbours share the peak equally
    # (band-limited shift: |sinc(0.5)| = 2/pi each).
    n, df = 64, 100.0
    img = simulate_epi(_point(), np.full((6, n, 4), df), pe="j", effective_echo_spacing=2.5 / (df * n),
                       echo_time=0.03)
    col = img[3, :, 2]
    assert col[22] == pytest.approx(2 / np.pi, abs=1e-3) and col[23] == pytest.approx(2 / np.pi, abs=1e-3)
    # PE along i with slices along k: shift of -2 voxels for i- (48 lines)
    rho = np.zeros((48, 5, 6))
    rho[30, 2, 3] = 1.0
    img = simulate_epi(rho, np.full(rho.shape, 50.0), pe="i-", effective_echo_spacing=2.0 / (50 * 48),
                       echo_time=0.05, slice_axis=2)
    assert np.unravel_index(np.argmax(img), img.shape) == (28, 2, 3)


def test_zero_field_reproduces_object(rng):
    obj = rng.random((10, 24, 6))
    for kind in ("spin-echo", "gradient-echo"):
        img = simulate_epi(obj, np.zeros(obj.shape), pe="j-", effective_echo_spacing=5e-4,
                           echo_time=0.03, kind=kind)
        assert np.abs(img - obj).max() < 1e-5


def test_acceleration_keeps_effective_timing():
    # BIDS: EffectiveEchoSpacing already includes in-plane acceleration, so R = 2 with
    # the same effective spacing gives the same line times and the same shift.
    t1 = line_times(64, pe=PEDirection(1, 1), effective_echo_spacing=4e-4)
    t2 = line_times(64, pe=PEDirection(1, 1), effective_echo_spacing=4e-4, acceleration=2)
    t3 = line_times(64, pe=PEDirection(1, -1), effective_echo_spacing=4e-4, acceleration=3)
    assert t1[32] == 0 and t1[33] == pytest.approx(4e-4)
    np.testing.assert_allclose(t2, t1, atol=1e-15)
    np.testing.assert_allclose(t3, -t1, atol=1e-15)
    img = simulate_epi(_point(), np.full((6, 64, 4), 100.0), pe="j", effective_echo_spacing=3 / 6400,
                       echo_time=0.03, acceleration=2)
    assert int(np.argmax(img[3, :, 2])) == 23


@pytest.mark.parametrize("cycles", [0.0, 0.25, 0.5, 0.75, 1.0, 1.5])
def test_through_plane_dephasing_follows_sinc(cycles):
    # Uniform object, field linear along the slice axis only: G dz TE = cycles.
    shape, dz, te = (4, 8, 9), 3.0, 0.03
    aff = np.diag([3.0, 3.0, dz, 1.0])
    g = cycles / (dz * te)                           # Hz/mm
    k = np.arange(shape[2]) * dz
    field = np.broadcast_to(g * k, shape).copy()
    obj = np.ones(shape)
    kw = dict(pe="j", effective_echo_spacing=5e-4, echo_time=te, affine=aff, n_subslices=25)
    ge = simulate_epi(obj, field, kind="gradient-echo", **kw)
    se = simulate_epi(obj, field, kind="spin-echo", **kw)
    expected = abs(np.sinc(cycles))                  # numpy sinc is sin(pi x)/(pi x)
    inner = (slice(None), slice(None), slice(2, -2))  # away from the edge slices
    # measured agreement: within 1e-3 (25-point midpoint rule; exact zero at 1 cycle)
    assert np.abs(ge[inner] - expected).max() < 3e-3
    assert np.abs(se[inner] - 1.0).max() < 1e-4       # spin echo: refocused at TE
    kept = true_retained_signal(field, echo_time=te, affine=aff, n_subslices=101)
    assert np.abs(kept[inner] - expected).max() < 2e-3


def test_gradient_echo_over_spin_echo_matches_true_retained_signal():
    # With a tiny echo spacing there is no in-plane shift, so GE / SE is the through-plane loss.
    rng = np.random.default_rng(3)
    shape = (6, 16, 12)
    aff = np.diag([2.0, 2.0, 3.0, 1.0])
    z = np.arange(shape[2]) * 3.0
    field = 40 * np.sin(z / 9.0)[None, None, :] + 5 * rng.standard_normal((shape[0], 1, 1))
    field = np.broadcast_to(field, shape).copy()
    obj = np.ones(shape)
    kw = dict(pe="j", effective_echo_spacing=1e-6, echo_time=0.04, affine=aff, n_subslices=41)
    ratio = simulate_epi(obj, field, kind="gradient-echo", **kw) / simulate_epi(obj, field, **kw)
    kept = true_retained_signal(field, echo_time=0.04, affine=aff, n_subslices=41)
    assert kept.min() < 0.9                            # there is real dephasing to compare
    assert np.abs(ratio - kept).max() < 1e-3


def test_noise_matches_stated_snr():
    obj = np.ones((8, 32, 8))
    img = simulate_epi(obj, np.zeros(obj.shape), pe="j", effective_echo_spacing=5e-4, echo_time=0.03,
                       snr=20, seed=1, return_complex=True)
    noise = img - 1.0
    # SNR definition: mean signal over the mask / per-channel noise sigma
    assert np.std(noise.real) == pytest.approx(1 / 20, rel=0.05)
    assert np.std(noise.imag) == pytest.approx(1 / 20, rel=0.05)


def test_unwarping_with_true_field_restores_undistorted_head():
    # End to end: k-space spin-echo EPI of the synthetic head, unwarped by the package's
    # engine (Jezzard & Balaban 1995 pixel-shift model with the Jacobian) using the true
    # field, compared with the undistorted object where the mapping is well conditioned
    # (0.5 < Jacobian < 1.5: pile-ups cannot be undone, Jezzard & Balaban 1995).
    import scipy.ndimage as ndi

    from epicorr.displacement import displacement_jacobian, field_to_displacement
    from epicorr.simulate import dipole_field_hz, shim, synthetic_head
    from epicorr.unwarp import unwarp

    head = synthetic_head(shape=(36, 44, 28), voxel_size_mm=5.0, seed=4)
    field = shim(dipole_field_hz(head.chi_ppm, affine=head.affine), mask=head.brain_mask,
                 affine=head.affine)
    ees, n_pe = 5e-4, 44
    epi = simulate_epi(head, field, pe="j-", effective_echo_spacing=ees, echo_time=0.06)
    disp = field_to_displacement(field, pe="j-", voxels_per_hz=ees * n_pe)
    assert np.abs(disp[head.brain_mask]).max() > 2.0          # real distortion to undo
    fixed = unwarp(epi, disp, pe_axis=1)
    jac = displacement_jacobian(disp, pe_axis=1)
    tissue = ~np.isin(head.labels, (0, 6, 7, 8))
    good = tissue & ndi.binary_erosion((jac > 0.5) & (jac < 1.5))
    truth = head.epi_contrast[good]

    def scores(img):
        a = img[good]
        return np.corrcoef(a, truth)[0, 1], np.sqrt(np.mean((a - truth) ** 2)) / truth.mean()

    r_before, e_before = scores(epi)
    r_after, e_after = scores(fixed)
    # measured (seed 4, 8460 voxels): r 0.904 -> 0.968, relative RMSE 0.189 -> 0.109
    assert r_after > 0.95 and r_after > r_before + 0.03
    assert e_after < 0.15 and e_after < 0.7 * e_before


@pytest.mark.parametrize("code,kind", [("j", "gradient-echo"), ("j-", "spin-echo")])
def test_factorised_sum_equals_explicit_encoding_matrix(code, kind):
    # The simulator evaluates s(ky) = sum_j a_j exp(-2 pi i [ky y_j / N + f_j t(ky)]) by a
    # factorisation; here the same sum is written out as an explicit matrix (the textbook
    # EPI signal equation, Bernstein et al. 2004 ch. 16), on a tiny grid, field constant
    # through each slice so no through-slice interpolation is involved.
    from epicorr.simulate._interp import cubic_matrix, linear_matrix

    rng = np.random.default_rng(7)
    nr, n, ns, p = 3, 12, 2, 3
    obj = rng.random((nr, n, ns))
    field = 30 * rng.standard_normal((nr, n, 1)) * np.ones((1, 1, ns))
    ees, te, pol = 6e-4, 0.035, (1 if code == "j" else -1)
    img = simulate_epi(obj, field, pe=code, effective_echo_spacing=ees, echo_time=te, kind=kind,
                       pe_oversample=p, n_subslices=3, return_complex=True)
    ky = np.arange(n) - n // 2
    t = pol * ky * ees + (te if kind == "gradient-echo" else 0.0)
    y = (np.arange(n * p) + 0.5) / p - 0.5
    u = linear_matrix(n, y, periodic=True)
    h = np.exp(-2j * np.pi * np.outer(ky, y) / n) @ u[:, 0] / p
    for r in range(nr):
        for k in range(ns):
            a = u @ obj[r, :, k] / p
            f = cubic_matrix(n, y) @ field[r, :, k]
            e = np.exp(-2j * np.pi * (np.outer(ky, y) / n + np.outer(t, f)))
            expected = np.exp(2j * np.pi * np.outer(np.arange(n), ky) / n) @ ((e @ a) / h) / n
            np.testing.assert_allclose(img[r, :, k], expected, atol=1e-5)
