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
