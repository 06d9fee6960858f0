"""A synthetic head phantom built from perturbed ellipsoids.

The head is described analytically in *head coordinates* (millimetres, RAS+:
x right, y anterior, z superior, origin near the centre of the brain) and is
sampled on any voxel grid.  A rigid *pose* (4 x 4, head -> world) places it
in the scanner, so a tilted head, an oblique grid or a moved head are all the
same operation: evaluate the analytic description at the world coordinates
of the grid's voxel centres.

Tissue classes (``Head.LABELS``, index = label value): outside air,
scalp/soft tissue, skull, CSF, grey matter, white matter, a frontal-sinus-like
air cavity above the orbits (inside the frontal bone: it never crosses the inner
table, so bone, CSF and meninges wall it off from the brain), a sphenoid-like
air cavity under the front of the brain, and ear-canal/mastoid-like air
cavities beside the inferior temporal lobes.  Surfaces are ellipsoids whose
radius is modulated by a few seeded low-frequency cosines, so every seed gives
a slightly different, smooth head.
Voxel properties (susceptibility, contrasts) are partial-volume averages over
``supersample**3`` points per voxel.

Volume susceptibilities (SI, ppm): water/soft tissue -9.05, air +0.36,
cortical bone about -8.9 (Schenck 1996, Table 1 and Fig. 2).  Brain tissue
and CSF take the water value: the small grey/white difference is not modelled.
Relaxation times and proton densities are typical 3 T values from memory
(order of magnitude only; nothing in the package depends on their exact value).

References
----------
Schenck JF. The role of magnetic susceptibility in magnetic resonance
imaging: MRI magnetic compatibility of the first and second kinds. Med Phys
1996;23:815-850.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["Head", "synthetic_head", "default_affine", "rigid_matrix", "LABELS"]

#: Tissue class names; the index is the label value.
LABELS = ("outside air", "scalp/soft tissue", "skull", "CSF", "grey matter", "white matter",
          "frontal sinus air", "sphenoid sinus air", "ear canal/mastoid air")

AIR_LABELS = (0, 6, 7, 8)

#: Volume susceptibility per class, ppm (SI).  Schenck 1996: water -9.05,
#: air +0.36, cortical bone about -8.9.
CHI_PPM = np.array([0.36, -9.05, -8.9, -9.05, -9.05, -9.05, 0.36, 0.36, 0.36])
#: Relative proton density (from memory, typical values).
PD = np.array([0.0, 0.7, 0.05, 1.0, 0.8, 0.7, 0.0, 0.0, 0.0])
#: T1 / T2 / T2* in seconds at 3 T (from memory, typical values; air: placeholders).
T1_S = np.array([1.0, 0.6, 0.3, 4.0, 1.4, 0.85, 1.0, 1.0, 1.0])
T2_S = np.array([1e-3, 0.06, 0.03, 1.5, 0.09, 0.07, 1e-3, 1e-3, 1e-3])
T2STAR_S = np.array([1e-3, 0.03, 1e-3, 0.3, 0.05, 0.045, 1e-3, 1e-3, 1e-3])

# Sequence parameters for the two stored contrasts (common practice values).
_EPI_TR, _EPI_TE = 3.0, 0.03     # spin-echo-like T2 weighting of a BOLD/DWI series
_GRE_TR = 0.5                     # short-TE gradient echo of a field-map scan


def rigid_matrix(*, rotation_deg=(0.0, 0.0, 0.0), translation_mm=(0.0, 0.0, 0.0)) -> np.ndarray:
    """4 x 4 rigid transform: rotations about world x, then y, then z (degrees), then a shift (mm).

    Parameters
    ----------
    rotation_deg : 3 floats
        Rotation about x (pitch), y (roll), z (yaw), degrees, applied in that order.
    translation_mm : 3 floats
        Translation in mm applied after the rotation.

    Returns
    -------
    (4, 4) ndarray
    """
    ax, ay, az = np.deg2rad(np.asarray(rotation_deg, dtype=float))
    rx = np.array([[1, 0, 0], [0, np.cos(ax), -np.sin(ax)], [0, np.sin(ax), np.cos(ax)]])
    ry = np.array([[np.cos(ay), 0, np.sin(ay)], [0, 1, 0], [-np.sin(ay), 0, np.cos(ay)]])
    rz = np.array([[np.cos(az), -np.sin(az), 0], [np.sin(az), np.cos(az), 0], [0, 0, 1]])
    out = np.eye(4)
    out[:3, :3] = rz @ ry @ rx
    out[:3, 3] = np.asarray(translation_mm, dtype=float)
    return out


def default_affine(shape, voxel_size_mm) -> np.ndarray:
    """Axis-aligned RAS+ affine (i -> R, j -> A, k -> S) centring the grid on the world origin."""
    vox = np.broadcast_to(np.asarray(voxel_size_mm, dtype=float), (3,))
    aff = np.diag([*vox, 1.0])
    aff[:3, 3] = -vox * (np.asarray(shape, dtype=float) - 1) / 2
    return aff


@dataclass(frozen=True)
class _Surface:
    center: np.ndarray
    semi: np.ndarray
    freqs: np.ndarray   # (K, 3) cycles over the unit sphere
    phases: np.ndarray  # (K,)
    amps: np.ndarray    # (K,) relative radius modulation

    def inside(self, p: np.ndarray) -> np.ndarray:
        q = (p - self.center) / self.semi
        r = np.sqrt(np.einsum("...i,...i->...", q, q))
        amax = float(np.sum(np.abs(self.amps)))
        out = r < 1 - amax
        shell = np.nonzero((r >= 1 - amax) & (r < 1 + amax))
        if shell[0].size:
            qs, rs = q[shell], r[shell]
            u = qs / np.maximum(rs, 1e-9)[:, None]
            mod = 1 + np.cos(2 * np.pi * (u @ self.freqs.T) + self.phases) @ self.amps
            out[shell] = rs < mod
        return out


def _surface(rng, center, semi, amp) -> _Surface:
    k = 6
    freqs = rng.normal(size=(k, 3))
    freqs *= rng.uniform(0.5, 2.0, size=(k, 1)) / np.linalg.norm(freqs, axis=1, keepdims=True)
    return _Surface(np.asarray(center, float), np.asarray(semi, float), freqs,
                    rng.uniform(0, 2 * np.pi, size=k), np.full(k, amp / np.sqrt(k)))


def _design(seed: int) -> dict:
    """The seeded analytic description (head coordinates, mm)."""
    rng = np.random.default_rng(seed)
    s0 = np.array([70.0, 86.0, 64.0]) * (1 + rng.uniform(-0.03, 0.03, size=3))
    d = {
        "head": _surface(rng, (0, 0, 0), s0, 0.015),
        "skull_out": _surface(rng, (0, 0, 0), s0 - 5, 0.01),
        "skull_in": _surface(rng, (0, 0, 0), s0 - 12, 0.01),
        "brain": _surface(rng, (0, 0, 0), s0 - 15, 0.015),
        "white": _surface(rng, (0, 0, 6), s0 - (22, 22, 24), 0.05),
        "vent_l": _surface(rng, (-11, -4, 14), (6, 24, 9), 0.05),
        "vent_r": _surface(rng, (11, -4, 14), (6, 24, 9), 0.05),
        # skull base plane z = base0 + base_slope * y (anterior fossa higher)
        "base0": -18.0 + rng.uniform(-2, 2),
        "base_slope": 0.12,
    }
    yf = s0[1] - 12
    d["frontal"] = _surface(rng, (0, yf, -4), (16, 6, 10) * rng.uniform(0.9, 1.1, 3), 0.05)
    zb = d["base0"] + d["base_slope"] * 22
    d["sphenoid"] = _surface(rng, (0, 22, zb - 10), (13, 11, 9) * rng.uniform(0.9, 1.1, 3), 0.05)
    zb = d["base0"] + d["base_slope"] * -8
    d["ears"] = [
        _surface(rng, (sx * (s0[0] - 12), -8, zb - 4), (13, 5, 5), 0.05) for sx in (-1, 1)
    ] + [
        _surface(rng, (sx * (s0[0] - 18), -22, zb - 8), (9, 9, 9) * rng.uniform(0.9, 1.1, 3), 0.08)
        for sx in (-1, 1)
    ]
    return d


def _labels_at(d: dict, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Labels and brain mask at head-coordinate points ``p`` (..., 3)."""
    lab = np.zeros(p.shape[:-1], dtype=np.int16)
    base = d["base0"] + d["base_slope"] * p[..., 1]
    z = p[..., 2]
    head = d["head"].inside(p)
    lab[head] = 1
    skull_out = d["skull_out"].inside(p)
    lab[skull_out] = 2
    inner = d["skull_in"].inside(p)
    lab[inner & (z >= base)] = 3
    lab[inner & (z < base - 6)] = 1
    brain = d["brain"].inside(p) & (z >= base + 3)
    lab[brain] = 4
    white = d["white"].inside(p) & (z >= base + 5)
    lab[white] = 5
    vent = d["vent_l"].inside(p) | d["vent_r"].inside(p)
    lab[vent & brain] = 3
    # The frontal sinus is a cavity of the frontal bone: it stays outside the inner
    # table, so bone, CSF and meninges separate its air from the brain.
    lab[d["frontal"].inside(p) & ~inner] = 6
    lab[d["sphenoid"].inside(p)] = 7
    for ear in d["ears"]:
        lab[ear.inside(p) & head] = 8
    mask = brain & ~np.isin(lab, AIR_LABELS)
    return lab, mask


@dataclass(frozen=True, eq=False)
class Head:
    """A synthetic head sampled on a voxel grid.

    All arrays have shape ``shape`` (voxel axes i, j, k = array axes 0, 1, 2).

    Attributes
    ----------
    affine : (4, 4) ndarray
        Voxel -> world (RAS+ mm).
    labels : int16 ndarray
        Tissue class at each voxel centre; names in :data:`LABELS`.
    chi_ppm : float ndarray
        Volume susceptibility, ppm (partial-volume average).
    brain_mask : bool ndarray
        Grey + white matter + ventricles.
    epi_contrast : float ndarray
        Spin-echo-like EPI signal (T2-weighted, TR 3 s, TE 30 ms), arbitrary units
        (no off-resonance effects: those come from :func:`simulate_epi`).
    gre_magnitude : float ndarray
        Short-TE gradient-echo magnitude at TE = 0 (PD/T1 weighting, TR 0.5 s);
        multiply by ``exp(-TE / t2star_s)`` for an echo time.
    t2star_s : float ndarray
        Intrinsic T2* in s.
    proton_density : float ndarray
        Relative proton density.
    tissue_fraction : float ndarray
        Fraction of each voxel not in air (any class but those of ``AIR_LABELS``),
        0..1 (partial-volume average); see :func:`epicorr.simulate.signal_side_field`.
    pose : (4, 4) ndarray
        Head -> world rigid transform used to sample the analytic head.
    seed : int
        Seed of the analytic description.
    """

    affine: np.ndarray
    labels: np.ndarray
    chi_ppm: np.ndarray
    brain_mask: np.ndarray
    epi_contrast: np.ndarray
    gre_magnitude: np.ndarray
    t2star_s: np.ndarray
    proton_density: np.ndarray
    tissue_fraction: np.ndarray
    pose: np.ndarray = field(default_factory=lambda: np.eye(4))
    seed: int = 0
    supersample: int = 2
    LABELS = LABELS

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.labels.shape)

    @property
    def voxel_size_mm(self) -> np.ndarray:
        return np.sqrt(np.sum(self.affine[:3, :3] ** 2, axis=0))

    def resampled(self, *, shape, affine) -> "Head":
        """The same head (same seed and pose) evaluated on another grid."""
        return _evaluate(shape=tuple(shape), affine=np.asarray(affine, float), pose=self.pose,
                         seed=self.seed, supersample=self.supersample)

    def moved(self, motion: np.ndarray) -> "Head":
        """The head after a rigid world-space motion ``motion`` (4 x 4), on the same grid."""
        return _evaluate(shape=self.shape, affine=self.affine, pose=np.asarray(motion) @ self.pose,
                         seed=self.seed, supersample=self.supersample)


def _evaluate(*, shape, affine, pose, seed, supersample) -> Head:
    d = _design(seed)
    inv_pose = np.linalg.inv(pose)
    to_head = inv_pose @ affine  # voxel -> head coordinates
    idx = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij"), -1)

    def head_points(offset):
        v = idx + offset
        return v @ to_head[:3, :3].T + to_head[:3, 3]

    labels, mask = _labels_at(d, head_points(np.zeros(3)))
    ss = max(int(supersample), 1)
    offs = (np.arange(ss) + 0.5) / ss - 0.5
    frac = np.zeros(shape + (len(LABELS),))
    for ox in offs:
        for oy in offs:
            for oz in offs:
                lab, _ = _labels_at(d, head_points(np.array([ox, oy, oz])))
                frac[..., :] += np.eye(len(LABELS))[lab]
    frac /= ss ** 3

    def prop(values):
        return frac @ values

    pd = prop(PD)
    epi = prop(PD * (1 - np.exp(-_EPI_TR / T1_S)) * np.exp(-_EPI_TE / T2_S))
    gre = prop(PD * (1 - np.exp(-_GRE_TR / T1_S)))
    # T2* averaged through the relaxation rate, weighted by signal.
    w = frac * PD
    r2s = (w @ (1 / T2STAR_S)) / np.maximum(w.sum(-1), 1e-12)
    t2s = np.where(w.sum(-1) > 0, 1 / np.maximum(r2s, 1e-12), T2STAR_S[0])
    return Head(affine=np.array(affine, float), labels=labels, chi_ppm=prop(CHI_PPM),
                brain_mask=mask, epi_contrast=epi, gre_magnitude=gre, t2star_s=t2s,
                proton_density=pd, tissue_fraction=1.0 - frac[..., list(AIR_LABELS)].sum(-1),
                pose=np.array(pose, float), seed=int(seed), supersample=ss)


def synthetic_head(*, shape=(64, 64, 48), voxel_size_mm=3.0, affine=None, seed=0,
                   rotation_deg=(0.0, 0.0, 0.0), translation_mm=(0.0, 0.0, 0.0),
                   supersample=2) -> Head:
    """Sample the synthetic head on a voxel grid.

    Parameters
    ----------
    shape : 3 ints
        Grid shape (i, j, k).
    voxel_size_mm : float or 3 floats
        Voxel size, mm, for the default axis-aligned grid (ignored when ``affine`` is given).
    affine : (4, 4) array, optional
        Voxel -> world (RAS+ mm) of the grid; default: axis-aligned (i -> R, j -> A,
        k -> S), centred on the world origin.  An oblique affine gives an oblique grid.
    seed : int
        Seed of the head's shape perturbations (same seed, same head).
    rotation_deg : 3 floats
        Head rotation in the scanner about world x (nod), y, z, degrees.
    translation_mm : 3 floats
        Head position in the scanner, mm.
    supersample : int
        Points per voxel edge for the partial-volume averages (1 = none).

    Returns
    -------
    Head
    """
    shape = tuple(int(n) for n in shape)
    if affine is None:
        affine = default_affine(shape, voxel_size_mm)
    pose = rigid_matrix(rotation_deg=rotation_deg, translation_mm=translation_mm)
    return _evaluate(shape=shape, affine=np.asarray(affine, float), pose=pose, seed=seed,
                     supersample=supersample)
