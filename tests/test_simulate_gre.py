"""Dual-echo GRE and rigid-motion simulation.

Sources: BIDS specification, "Fieldmap data", case 1: the field is
phasediff / (2 pi (EchoTime2 - EchoTime1)); integer phase coding -4096..4095 spanning
2 pi is common practice.
"""

import numpy as np
import pytest

from epicorr.simulate import (default_affine, dipole_field_hz, rigid_motion, shim, simulate_dual_echo,
                              synthetic_head)


@pytest.fixture(scope="module")
def head_and_field():
    head = synthetic_head(shape=(40, 40, 30), voxel_size_mm=5.0, seed=2)
    field = shim(dipole_field_hz(head.chi_ppm, affine=head.affine), mask=head.brain_mask, affine=head.affine)
    return head, field


def test_phase_difference_gives_field_on_another_grid(head_and_field):
    head, field = head_and_field
    aff = default_affine((36, 36, 28), 5.5)
    aff[:3, 3] += (1.0, -2.0, 0.5)
    data = simulate_dual_echo(head, field, target_shape=(36, 36, 28), target_affine=aff, snr=None)
    mags, phases = data
    assert mags[0].shape == (36, 36, 28) and data.field_hz.shape == (36, 36, 28)
    dte = data.echo_times[1] - data.echo_times[0]
    assert dte == pytest.approx(2.46e-3)
    est = np.angle(np.exp(1j * (phases[1] - phases[0]))) / (2 * np.pi * dte)
    brain = data.brain_mask & (np.abs(data.field_hz) < 0.45 / dte)   # inside the unwrapped range
    assert brain.sum() > 1000
    assert np.abs(est - data.field_hz)[brain].max() < 1e-6
    # T2* decay: the second echo is weaker in tissue
    assert np.all(mags[1][brain] < mags[0][brain])
    assert np.all((phases[0] >= -np.pi) & (phases[0] < np.pi))


def test_noise_randomises_phase_where_there_is_no_signal(head_and_field):
    head, field = head_and_field
    data = simulate_dual_echo(head, field, snr=40, seed=5)
    air = head.labels == 0
    ph = data.phases[0][air]
    # uniform on [-pi, pi): mean resultant length near 0, spread near pi / sqrt(3)
    assert abs(np.mean(np.exp(1j * ph))) < 0.05
    assert np.std(ph) == pytest.approx(np.pi / np.sqrt(3), rel=0.05)


def test_integer_phase_coding(head_and_field):
    head, field = head_and_field
    rad = simulate_dual_echo(head, field, snr=None)
    code = simulate_dual_echo(head, field, snr=None, phase_coding="integer")
    assert code.phases[0].dtype == np.int16
    assert code.phases[0].min() >= -4096 and code.phases[0].max() <= 4095
    back = code.phases[0] * np.pi / 4096
    assert np.abs(np.angle(np.exp(1j * (back - rad.phases[0])))).max() <= np.pi / 4096 + 1e-9


def test_translation_by_one_voxel_moves_labels_by_one_voxel():
    head = synthetic_head(shape=(32, 32, 24), voxel_size_mm=6.0, seed=0, supersample=1)
    moved = rigid_motion(head, translation_mm=(0.0, 6.0, 0.0))
    np.testing.assert_array_equal(moved.labels[:, 1:], head.labels[:, :-1])
    turned = rigid_motion(head, rotation_deg=(2.0, 0.0, 0.0))
    changed = np.mean(turned.labels != head.labels)
    assert 0.005 < changed < 0.1
