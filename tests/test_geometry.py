"""Acquisition geometry against the BIDS specification and Jezzard & Balaban 1995."""

import math

import numpy as np
import pytest

from epicorr.errors import EpicorrInputError
from epicorr.geometry import PEDirection, parse_pe_direction, readout_timing
from epicorr.options import Interpolation, parse_option


@pytest.mark.parametrize("code,axis,pol", [("i", 0, 1), ("i-", 0, -1), ("j", 1, 1),
                                           ("j-", 1, -1), ("k", 2, 1), ("k-", 2, -1)])
def test_pe_codes_follow_bids(code, axis, pol):
    # BIDS specification, PhaseEncodingDirection: letter = array axis, "-" = reversed.
    pe = parse_pe_direction(code)
    assert (pe.axis, pe.polarity) == (axis, pol)
    assert pe.bids == code
    assert pe.reversed().polarity == -pol


@pytest.mark.parametrize("bad", ["y", "y-", "x", "", "j+", "jj", None, 1, "AP"])
def test_pe_rejects_non_bids(bad):
    with pytest.raises(EpicorrInputError, match="PhaseEncodingDirection"):
        parse_pe_direction(bad, file="sub-01_bold.json")


def test_bids_total_readout_relation():
    # BIDS specification: TotalReadoutTime = EffectiveEchoSpacing * (ReconMatrixPE - 1).
    t = readout_timing({"TotalReadoutTime": 0.0475, "ReconMatrixPE": 96}, n_pe_image=64)
    assert t.n_pe == 96
    assert t.effective_echo_spacing == pytest.approx(0.0475 / 95, rel=1e-12)
    assert t.total_readout_time == pytest.approx(0.0475, rel=1e-12)
    # Jezzard & Balaban 1995: displacement per Hz is EES * N, pixel bandwidth 1/(EES N).
    assert t.voxels_per_hz == pytest.approx(0.0475 / 95 * 96)
    assert t.pixel_bandwidth_pe == pytest.approx(1 / (0.0475 / 95 * 96))
    assert "TotalReadoutTime" in t.sources["effective_echo_spacing"]


def test_echo_spacing_preferred_and_image_size_fallback():
    t = readout_timing({"EffectiveEchoSpacing": 5e-4}, n_pe_image=80)
    assert t.n_pe == 80 and t.voxels_per_hz == pytest.approx(0.04)
    assert "image" in t.sources["n_pe"]


@pytest.mark.parametrize("meta,key", [
    ({}, "EffectiveEchoSpacing"),
    ({"EffectiveEchoSpacing": 0}, "EffectiveEchoSpacing"),
    ({"EffectiveEchoSpacing": -5e-4}, "EffectiveEchoSpacing"),
    ({"EffectiveEchoSpacing": float("nan")}, "EffectiveEchoSpacing"),
    ({"EffectiveEchoSpacing": 0.5}, "EffectiveEchoSpacing"),   # ms written as s? 0.5 s spacing
    ({"EffectiveEchoSpacing": "0.0005"}, "EffectiveEchoSpacing"),
    ({"TotalReadoutTime": 47.5}, "TotalReadoutTime"),           # ms instead of s
    ({"TotalReadoutTime": math.inf}, "TotalReadoutTime"),
    ({"EffectiveEchoSpacing": 5e-4, "TotalReadoutTime": 0.09}, "TotalReadoutTime"),
    ({"EffectiveEchoSpacing": 5e-4, "ReconMatrixPE": 1.5}, "ReconMatrixPE"),
])
def test_readout_rejects_bad_values_naming_key_and_file(meta, key):
    with pytest.raises(EpicorrInputError) as info:
        readout_timing(meta, n_pe_image=96, file="sub-01_task-x_bold.json")
    msg = str(info.value)
    assert key in msg and "sub-01_task-x_bold.json" in msg
    assert "\n" not in msg


def test_error_is_value_error():
    assert issubclass(EpicorrInputError, ValueError)


def test_options_validated_in_one_place():
    assert parse_option(Interpolation, "LINEAR", name="x") is Interpolation.LINEAR
    with pytest.raises(EpicorrInputError, match="'cubic', 'linear'"):
        parse_option(Interpolation, "quintic", name="--interpolation")


def test_pe_direction_dataclass_validates():
    with pytest.raises(EpicorrInputError):
        PEDirection(3, 1)
    assert np.isscalar(PEDirection(1, -1).axis)
