"""B0 field from a susceptibility distribution: the Fourier dipole model.

For a weakly magnetic object (``|chi| << 1``) in a uniform field ``B0`` along
the unit vector ``b`` (the scanner z axis in world coordinates), the
Lorentz-corrected relative field shift is, in Fourier space,

    dB/B0 (k) = D(k) chi(k),   D(k) = 1/3 - (k . b)^2 / |k|^2

(Salomir et al. 2003; Marques & Bowtell 2005).  The kernel is evaluated on the
*voxel* FFT grid by mapping each voxel-space frequency ``kv`` (cycles/voxel) to
world space, ``kw = A^-T kv`` with ``A`` the 3 x 3 part of the affine, so an
oblique grid or a tilted head gets the field of its true orientation.

Conventions
-----------
* ``chi`` is taken relative to a background value (default: the median of
  the array's border voxels, i.e. the surrounding air), and the volume is
  zero-padded to ``pad_factor`` times its size so periodic copies are far away.
* ``D(0)`` is set to 0: a uniform susceptibility produces no field shift
  (Lorentz sphere correction), and the field's mean over the padded grid is 0.
  With this convention the field inside a uniformly magnetised sphere is 0.
* Output in Hz: ``field_hz = GAMMA_BAR * B0 * dB/B0``.

References
----------
Salomir R, de Senneville BD, Moonen CTW. A fast calculation method for
magnetic field inhomogeneity due to an arbitrary distribution of bulk
susceptibility. Concepts Magn Reson B 2003;19B:26-34.

Marques JP, Bowtell R. Application of a Fourier-based method for rapid
calculation of field inhomogeneity due to spatial variation of magnetic
susceptibility. Concepts Magn Reson B 2005;25B:65-78.
"""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft

from ..constants import GAMMA_BAR_HZ_PER_T
from ..errors import EpicorrInputError

__all__ = ["dipole_kernel", "dipole_field_hz", "shim", "signal_side_field"]


def dipole_kernel(shape, *, affine, b0_direction=(0.0, 0.0, 1.0)) -> np.ndarray:
    """The dipole kernel ``D(k)`` on the (full, unshifted) FFT grid of ``shape``.

    Parameters
    ----------
    shape : 3 ints
        FFT grid shape.
    affine : (4, 4) array
        Voxel -> world (RAS+ mm); only the 3 x 3 part is used.
    b0_direction : 3 floats
        B0 direction in world coordinates (default scanner z).

    Returns
    -------
    ndarray, shape ``shape``
        ``1/3 - (k.b)^2/|k|^2`` with ``D(0) = 0``.
    """
    a = np.asarray(affine, float)[:3, :3]
    b = np.asarray(b0_direction, float)
    b = b / np.linalg.norm(b)
    minv_t = np.linalg.inv(a).T
    kv = np.meshgrid(*[sfft.fftfreq(n) for n in shape], indexing="ij")
    kw = [sum(minv_t[r, c] * kv[c] for c in range(3)) for r in range(3)]
    k2 = kw[0] ** 2 + kw[1] ** 2 + kw[2] ** 2
    kb = b[0] * kw[0] + b[1] * kw[1] + b[2] * kw[2]
    with np.errstate(invalid="ignore", divide="ignore"):
        d = 1.0 / 3.0 - kb ** 2 / k2
    d[(0,) * len(shape)] = 0.0
    return d


def dipole_field_hz(chi_ppm, *, affine, b0_tesla=3.0, pad_factor=2, background_ppm=None,
                    b0_direction=(0.0, 0.0, 1.0)) -> np.ndarray:
    """Off-resonance field (Hz) of a susceptibility map, Fourier dipole model.

    Parameters
    ----------
    chi_ppm : (I, J, K) array
        Volume susceptibility, ppm (SI).
    affine : (4, 4) array
        Voxel -> world (RAS+ mm) of the grid.
    b0_tesla : float
        Main field, T.
    pad_factor : float or 3 floats
        Zero-padding: the FFT grid is at least ``pad_factor`` times the array along each
        axis (per axis when a sequence; 1 = no padding, i.e. periodic along that axis).
    background_ppm : float, optional
        Susceptibility of the surroundings (default: median of the border voxels).
    b0_direction : 3 floats
        B0 direction in world coordinates (scanner z).

    Returns
    -------
    (I, J, K) ndarray
        Field offset in Hz (``GAMMA_BAR_HZ_PER_T * b0_tesla * dB/B0``); ``D(0) = 0``.
    """
    chi = np.asarray(chi_ppm, dtype=float)
    if background_ppm is None:
        border = np.concatenate([chi[[0, -1]].ravel(), chi[:, [0, -1]].ravel(),
                                 chi[:, :, [0, -1]].ravel()])
        background_ppm = float(np.median(border))
    rel = (chi - background_ppm) * 1e-6
    pads = np.broadcast_to(np.asarray(pad_factor, float), (3,))
    big = tuple(n if pf <= 1 else sfft.next_fast_len(int(np.ceil(n * pf)))
                for n, pf in zip(chi.shape, pads))
    kernel = dipole_kernel(big, affine=affine, b0_direction=b0_direction)
    spec = sfft.fftn(rel, s=big, workers=-1)
    db = sfft.ifftn(spec * kernel, workers=-1).real
    db = db[tuple(slice(0, n) for n in chi.shape)]
    return GAMMA_BAR_HZ_PER_T * float(b0_tesla) * db


def _world_coords(shape, affine) -> np.ndarray:
    idx = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij"), -1)
    a = np.asarray(affine, float)
    return idx @ a[:3, :3].T + a[:3, 3]


def shim(field_hz, *, mask, affine, order=1, return_coefficients=False):
    """Remove the mean and the low-order spatial terms of a field over a mask (shim stand-in).

    Least-squares fit over ``mask`` of a polynomial in world coordinates
    (mm, centred on the mask's centroid): order 0 = constant, 1 = + x, y, z,
    2 = + the six second-order terms; the fit is subtracted everywhere.

    Parameters
    ----------
    field_hz : (I, J, K) array
        Field, Hz.
    mask : (I, J, K) bool array
        Voxels the fit uses (e.g. ``Head.brain_mask``).
    affine : (4, 4) array
        Voxel -> world (RAS+ mm).
    order : {0, 1, 2}
    return_coefficients : bool
        Also return the fitted coefficients (Hz, Hz/mm, Hz/mm^2) and the centroid.

    Returns
    -------
    shimmed : (I, J, K) ndarray
    coefficients, centroid : ndarray, only when ``return_coefficients``
    """
    f = np.asarray(field_hz, float)
    m = np.asarray(mask, bool)
    xyz = _world_coords(f.shape, affine)
    c = xyz[m].mean(axis=0)
    x, y, z = np.moveaxis(xyz - c, -1, 0)
    terms = [np.ones_like(x)]
    if order >= 1:
        terms += [x, y, z]
    if order >= 2:
        terms += [x * x, y * y, z * z, x * y, x * z, y * z]
    basis = np.stack(terms, -1)
    coef, *_ = np.linalg.lstsq(basis[m], f[m], rcond=None)
    out = f - basis @ coef
    if return_coefficients:
        return out, coef, c
    return out


def signal_side_field(field_hz, *, tissue_fraction, min_fraction=0.99, keep=None):
    """The field the *signal* experiences: tissue values carried across tissue/air borders.

    The Fourier dipole field on a voxel grid is the field at voxel centres of a
    partial-volume susceptibility map.  Across a tissue/air border it jumps by
    hundreds of Hz (outside a water sphere in 3 T the shift reaches
    ``2/3 * 9.4 ppm * 127.7 MHz``, about 800 Hz, while the inside is uniform).
    A border voxel's tissue sits on the tissue side of that jump, yet its
    voxel-centre value is part air; and an EPI simulator that interpolates the
    field between voxels (sub-voxel PE samples) hands the air's field to tissue
    signal next to it.  That throws the faint edge signal of the scalp several
    voxels along PE and folds it over, an artefact of the discretisation, not of
    the head.

    This function keeps the field in voxels that are (almost) all tissue, and
    in ``keep``, and gives every other voxel the value of the nearest kept voxel
    (Euclidean distance in voxel units, :func:`scipy.ndimage.distance_transform_edt`).
    Air voxels carry no signal, so only what the signal sees changes.

    Parameters
    ----------
    field_hz : (I, J, K) array
        Field, Hz (e.g. from :func:`dipole_field_hz` and :func:`shim`).
    tissue_fraction : (I, J, K) array
        Non-air fraction of each voxel, 0..1 (``Head.tissue_fraction``).
    min_fraction : float
        Voxels with at least this tissue fraction keep their value.
    keep : (I, J, K) bool array, optional
        Voxels that keep their value whatever their fraction (e.g. the brain
        mask, so the ground truth inside the brain is untouched).

    Returns
    -------
    (I, J, K) ndarray
        Field, Hz; equal to ``field_hz`` wherever a value was kept.  If no
        voxel qualifies, ``field_hz`` is returned unchanged (as a copy).
    """
    from scipy import ndimage

    f = np.asarray(field_hz, float)
    kept = np.asarray(tissue_fraction, float) >= float(min_fraction)
    if keep is not None:
        kept |= np.asarray(keep, bool)
    if kept.shape != f.shape:
        raise EpicorrInputError("tissue fraction and field must have the same shape",
                                key="tissue_fraction", value=(kept.shape, f.shape))
    if not kept.any() or kept.all():
        return f.copy()
    _, idx = ndimage.distance_transform_edt(~kept, return_indices=True)
    return f[tuple(idx)]
