"""Brain mask of a corrected EPI volume (epicorr.brainmask).

Reference: the simulator's tissue labels (grey + white matter + ventricles)
of a synthetic head imaged by the k-space EPI simulator (no off-resonance);
Dice overlap as in Dice, Ecology 1945;26:297.  Limits: common practice for a
statistics mask (the mask may add the CSF around the brain, never lose the
brain).
"""

from __future__ import annotations

import numpy as np
import pytest

from epicorr.brainmask import epi_brain_mask
from epicorr.errors import EpicorrInputError
from epicorr.simulate import default_affine, simulate_epi, synthetic_head


@pytest.mark.parametrize("seed", [0, 3])
def test_brain_of_the_synthetic_head_without_the_scalp(seed):
    shape = (48, 56, 40)
    head = synthetic_head(shape=shape, affine=default_affine(shape, 3.5), seed=seed)
    img = simulate_epi(head, np.zeros(shape), pe="j", effective_echo_spacing=5e-4, echo_time=0.03, snr=40,
                       seed=seed)
    mask = epi_brain_mask(img)
    truth = head.brain_mask
    dice = 2 * np.sum(mask & truth) / (mask.sum() + truth.sum())
    assert np.sum(mask & truth) / truth.sum() > 0.97      # keeps the brain
    assert dice > 0.85
    scalp = head.labels == 1
    assert np.sum(mask & scalp) < 0.05 * scalp.sum()      # leaves the scalp out


def test_bad_volumes_are_refused():
    with pytest.raises(EpicorrInputError, match="3-D"):
        epi_brain_mask(np.ones((4, 4)))
    with pytest.raises(EpicorrInputError, match="constant or empty"):
        epi_brain_mask(np.zeros((8, 8, 8)))
    with pytest.raises(EpicorrInputError, match="erosion"):
        epi_brain_mask(np.random.default_rng(0).random((8, 8, 8)), erosion=0)


def test_node_uses_the_first_volume_and_stays_inside_the_measurement_mask(tmp_path):
    """Node contract (nipype SimpleInterface): a 4-D series in, a uint8 mask out in the node folder."""
    import nibabel as nib

    from epicorr.nodes import EpiBrainMask

    shape = (48, 56, 40)
    aff = default_affine(shape, 3.5)
    head = synthetic_head(shape=shape, affine=aff, seed=1)
    img = simulate_epi(head, np.zeros(shape), pe="j", effective_echo_spacing=5e-4, echo_time=0.03, snr=40,
                       seed=1)
    series = np.stack([img, np.zeros(shape)], axis=-1)   # 2nd volume empty: only the 1st may be used
    nib.save(nib.Nifti1Image(series.astype(np.float32), aff), tmp_path / "bold.nii.gz")
    measured = np.zeros(shape, np.uint8)
    measured[:, : shape[1] // 2] = 1                      # half the volume measured
    nib.save(nib.Nifti1Image(measured, aff), tmp_path / "measured.nii.gz")
    work = tmp_path / "node"
    work.mkdir()
    res = EpiBrainMask(in_file=str(tmp_path / "bold.nii.gz"),
                       measurement_mask=str(tmp_path / "measured.nii.gz")).run(cwd=str(work))
    out = nib.load(res.outputs.out_file)
    mask = np.asanyarray(out.dataobj)
    assert out.get_data_dtype() == np.uint8 and out.shape == shape
    assert res.outputs.out_file.startswith(str(work))
    assert np.allclose(out.affine, aff)
    assert mask[:, shape[1] // 2:].sum() == 0                           # inside the measurement mask
    whole = epi_brain_mask(img)
    assert mask.sum() == res.outputs.n_voxels == np.sum(whole & (measured > 0)) > 0
