"""Figures of the QC pages, drawn with matplotlib (Agg canvas) and returned as data URIs.

Every function takes arrays on one voxel grid, shape ``(I, J, K)``, and returns
``"data:image/png;base64,..."`` strings that the templates embed, so a page is
one self-contained file.  No pyplot: each figure owns its Agg canvas, so the
caller's matplotlib backend is never touched.

Slices are shown in RAS+ orientation (closest canonical axes of the affine):
sagittal with anterior to the right, coronal and axial with the subject's left
on the left of the image (marked "L"/"R").
"""

from __future__ import annotations

import base64
import io
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import ListedColormap, TwoSlopeNorm
from matplotlib.figure import Figure
from scipy import ndimage

__all__ = ["SliceView", "field_figure", "displacement_histogram", "comparison_images",
           "dropout_figure", "uncertainty_figure", "pair_figure", "to_data_uri"]

#: Dots per inch of every figure (keeps a page small; common practice for web QC).
DPI = 100
_ORIENTS = ("sagittal", "coronal", "axial")
#: Order of the three slice orientations in every figure.
ORIENTATIONS = _ORIENTS
_FIELD_CMAP = "RdBu_r"
_EDGE_COLOUR = "#ffd21f"
_DROPOUT_COLOUR = "#19e3ff"
_PANEL_BG = "#101418"


def to_data_uri(fig: Figure, *, fmt: str = "png") -> str:
    """Render a figure to a base64 data URI and release it.

    PNG output is reduced to an adaptive 256-colour palette (Pillow, a matplotlib
    dependency), which keeps slice figures at a few tens of kB.
    """
    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, facecolor=fig.get_facecolor())
    buf.seek(0)
    from PIL import Image

    img = Image.open(buf).convert("RGB")
    out = io.BytesIO()
    if fmt == "jpeg":
        img.save(out, format="JPEG", quality=85)
        mime = "image/jpeg"
    else:
        img.quantize(colors=256, method=Image.Quantize.MEDIANCUT).save(out, format="PNG",
                                                                        optimize=True)
        mime = "image/png"
    return f"data:{mime};base64," + base64.b64encode(out.getvalue()).decode("ascii")


@dataclass
class SliceView:
    """Three orthogonal slices through a point, in RAS+ orientation.

    Build with :meth:`from_grid`; then :meth:`plane` gives the 2-D slice of any
    volume on the same grid, ready for ``imshow(origin="lower")``.
    """

    ornt: np.ndarray
    voxel_size: tuple[float, float, float]
    centre: tuple[int, int, int]
    shape: tuple[int, int, int]

    @classmethod
    def from_grid(cls, shape: Sequence[int], *, voxel_size_mm: Sequence[float],
                  affine: np.ndarray | None = None, mask: np.ndarray | None = None) -> "SliceView":
        """Set up the view of a grid; the slices cross the mask's centre of mass."""
        from nibabel.orientations import io_orientation

        ornt = (io_orientation(np.asarray(affine, dtype=float)) if affine is not None
                else np.array([[0, 1], [1, 1], [2, 1]], dtype=float))
        vs = [0.0, 0.0, 0.0]
        shp = [0, 0, 0]
        for ax in range(3):
            vs[int(ornt[ax, 0])] = float(voxel_size_mm[ax])
            shp[int(ornt[ax, 0])] = int(shape[ax])
        view = cls(ornt=ornt, voxel_size=tuple(vs), centre=(0, 0, 0), shape=tuple(shp))
        if mask is not None and np.any(mask):
            c = ndimage.center_of_mass(view.canonical(np.asarray(mask) > 0))
            view.centre = tuple(int(round(x)) for x in c)
        else:
            view.centre = tuple(s // 2 for s in shp)
        return view

    def canonical(self, volume: np.ndarray) -> np.ndarray:
        """The volume with axes reordered and flipped to RAS+."""
        from nibabel.orientations import apply_orientation

        return apply_orientation(np.asarray(volume), self.ornt)

    def canonical_axis(self, axis: int) -> int:
        """Which RAS axis (0 = x, 1 = y, 2 = z) a voxel axis of the grid ends up on."""
        return int(self.ornt[axis, 0])

    def plane(self, canon: np.ndarray, orient: str) -> np.ndarray:
        """2-D slice (rows = vertical axis) of a canonical volume."""
        x, y, z = self.centre
        if orient == "sagittal":
            p = canon[x, :, :]
        elif orient == "coronal":
            p = canon[:, y, :]
        else:
            p = canon[:, :, z]
        return np.asarray(p, dtype=float).T

    def aspect(self, orient: str) -> float:
        """Pixel aspect (vertical mm / horizontal mm) for ``imshow``."""
        vx, vy, vz = self.voxel_size
        return {"sagittal": vz / vy, "coronal": vz / vx, "axial": vy / vx}[orient]

    def width_ratios(self, orients: Sequence[str] = _ORIENTS) -> list[float]:
        """Physical width / height of each panel, so panels share one height."""
        nx, ny, nz = self.shape
        vx, vy, vz = self.voxel_size
        dims = {"sagittal": (ny * vy, nz * vz), "coronal": (nx * vx, nz * vz),
                "axial": (nx * vx, ny * vy)}
        return [dims[o][0] / dims[o][1] for o in orients]

    def title(self, orient: str) -> str:
        idx = {"sagittal": 0, "coronal": 1, "axial": 2}[orient]
        return f"{orient} (slice {self.centre[idx]})"


def _window(volume: np.ndarray, mask: np.ndarray | None = None) -> tuple[float, float]:
    v = np.asarray(volume, dtype=float)
    vals = v[np.asarray(mask) > 0] if mask is not None and np.any(mask) else v[np.isfinite(v)]
    vals = vals[np.isfinite(vals)]
    if vals.size == 0:
        return 0.0, 1.0
    lo, hi = np.percentile(vals, [1.0, 99.5])
    lo = min(float(lo), 0.0) if float(lo) >= 0 else float(lo)
    return lo, float(hi) if hi > lo else lo + 1.0


def _otsu(values: np.ndarray) -> float:
    """Otsu's threshold (between-class variance maximum) of a sample."""
    hist, edges = np.histogram(values, bins=128)
    centres = 0.5 * (edges[1:] + edges[:-1])
    w0 = np.cumsum(hist)
    w1 = w0[-1] - w0
    m0 = np.cumsum(hist * centres)
    mu0 = m0 / np.maximum(w0, 1)
    mu1 = (m0[-1] - m0) / np.maximum(w1, 1)
    between = w0 * w1 * (mu0 - mu1) ** 2
    return float(centres[int(np.argmax(between))])


def _edge_levels(edges: np.ndarray) -> list[float]:
    """One contour level: Otsu's threshold of the (smoothed) edge image."""
    v = np.asarray(edges, dtype=float)
    vals = v[np.isfinite(v)]
    if vals.size == 0 or np.ptp(vals) == 0:
        return []
    return [_otsu(vals)]


def _new_fig(width: float, height: float) -> Figure:
    fig = Figure(figsize=(width, height), dpi=DPI, facecolor=_PANEL_BG)
    return fig


def _style_axis(ax, title: str | None = None) -> None:
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_facecolor("black")
    for s in ax.spines.values():
        s.set_visible(False)
    if title:
        ax.set_title(title, color="#d8dee4", fontsize=8, pad=3)


def _side_labels(ax, orient: str, plane: np.ndarray) -> None:
    kw = dict(color="#9aa7b2", fontsize=7, transform=ax.transAxes, va="top")
    if orient == "sagittal":
        ax.text(0.02, 0.98, "P", ha="left", **kw)
        ax.text(0.98, 0.98, "A", ha="right", **kw)
    else:
        ax.text(0.02, 0.98, "L", ha="left", **kw)
        ax.text(0.98, 0.98, "R", ha="right", **kw)


def _slice_row(fig: Figure, view: SliceView, *, left: float = 0.01, right: float = 0.99,
               bottom: float = 0.02, top: float = 0.9, orients: Sequence[str] = _ORIENTS):
    gs = fig.add_gridspec(1, len(orients), width_ratios=view.width_ratios(orients),
                          left=left, right=right, bottom=bottom, top=top, wspace=0.04)
    return [fig.add_subplot(gs[0, n]) for n in range(len(orients))]


def _grey(ax, view: SliceView, canon: np.ndarray, orient: str, window: tuple[float, float]):
    p = view.plane(canon, orient)
    ax.imshow(p, cmap="gray", vmin=window[0], vmax=window[1], origin="lower",
              aspect=view.aspect(orient), interpolation="nearest")
    _side_labels(ax, orient, p)


def field_figure(view: SliceView, *, reference: np.ndarray, field_hz: np.ndarray,
                 mask: np.ndarray | None = None) -> str:
    """Field (Hz) over the reference, three orientations, diverging scale and colour bar.

    Parameters
    ----------
    view : SliceView
    reference : ndarray, shape (I, J, K)
        Underlay (e.g. the corrected EPI reference).
    field_hz : ndarray, shape (I, J, K)
        Field offset, Hz; shown inside ``mask`` (everywhere if None), symmetric
        colour limits at the 99th percentile of ``|field|``.
    """
    ref = view.canonical(reference)
    fld = view.canonical(field_hz).astype(float)
    m = view.canonical(mask > 0) if mask is not None else np.isfinite(fld)
    vals = np.abs(fld[m & np.isfinite(fld)])
    lim = float(np.percentile(vals, 99)) if vals.size else 1.0
    lim = lim if lim > 0 else 1.0
    fig = _new_fig(9.6, 3.2)
    axes = _slice_row(fig, view, right=0.88)
    win = _window(ref, mask=None)
    im = None
    for ax, orient in zip(axes, _ORIENTS):
        _grey(ax, view, ref, orient, win)
        p = view.plane(np.where(m, fld, np.nan), orient)
        im = ax.imshow(np.ma.masked_invalid(p), cmap=_FIELD_CMAP,
                       norm=TwoSlopeNorm(vcenter=0.0, vmin=-lim, vmax=lim), origin="lower",
                       aspect=view.aspect(orient), alpha=0.72, interpolation="nearest")
        _style_axis(ax, view.title(orient))
    cax = fig.add_axes([0.905, 0.1, 0.018, 0.74])
    cb = fig.colorbar(im, cax=cax)
    cb.set_label("field offset (Hz)", color="#d8dee4", fontsize=8)
    cb.ax.tick_params(colors="#d8dee4", labelsize=7)
    cb.solids.set_alpha(1.0)
    return to_data_uri(fig)


def displacement_histogram(displacement_vox: np.ndarray, *, mask: np.ndarray | None = None,
                           pe_voxel_mm: float = 1.0) -> str:
    """Histogram of the PE displacement in the brain, voxels (bottom) and mm (top).

    Dashed lines mark the 1st, 50th and 99th percentiles; grey bands the ±1 and
    ±3 voxel limits used by the "moved" shares.
    """
    d = np.asarray(displacement_vox, dtype=float)
    vals = d[np.asarray(mask) > 0] if mask is not None else d.ravel()
    vals = vals[np.isfinite(vals)]
    fig = Figure(figsize=(9.6, 2.9), dpi=DPI, facecolor="white")
    ax = fig.add_axes([0.08, 0.17, 0.9, 0.63])
    span = max(3.5, float(np.max(np.abs(vals))) * 1.05) if vals.size else 3.5
    ax.axvspan(-1, 1, color="#eef1f4", zorder=0)
    for x in (-3, 3):
        ax.axvline(x, color="#b8c0c8", lw=0.8, zorder=1)
    ax.hist(vals, bins=80, range=(-span, span), color="#4d6d8a", zorder=2)
    if vals.size:
        for p, q in zip((1, 50, 99), np.percentile(vals, [1, 50, 99])):
            ax.axvline(q, color="#c2410c", lw=1.0, ls="--", zorder=3)
            ax.text(q, 0.97, f"{p}%\n{q:.2f}", transform=ax.get_xaxis_transform(), fontsize=7,
                    ha="center", va="top", color="#c2410c",
                    bbox=dict(facecolor="white", edgecolor="none", alpha=0.8, pad=1))
    ax.set_xlim(-span, span)
    ax.set_xlabel("displacement along phase encoding (voxels)", fontsize=8)
    ax.set_ylabel("brain voxels", fontsize=8)
    ax.tick_params(labelsize=7)
    mm = float(pe_voxel_mm)
    top = ax.secondary_xaxis("top", functions=(lambda v: v * mm, lambda v: v / mm))
    top.set_xlabel("mm", fontsize=8)
    top.tick_params(labelsize=7)
    return to_data_uri(fig)


def comparison_images(view: SliceView, *, before: np.ndarray, after: np.ndarray,
                      edges: np.ndarray | None) -> list[tuple[str, str, str, float]]:
    """Before and after slices of identical size, with the same contours drawn on both.

    Parameters
    ----------
    before, after : ndarray, shape (I, J, K)
        The reference as acquired and corrected; one grey window for both
        (from ``after``), so brightness differences are real.
    edges : ndarray, shape (I, J, K) or None
        Image whose iso-contour (Otsu level, after light smoothing) is drawn; the corrected
        reference when None.

    Returns
    -------
    list of (str, str, str, float)
        ``(orientation title, before URI, after URI, width/height)`` for sagittal,
        coronal and axial.
    """
    edge_src = view.canonical(after if edges is None else edges).astype(float)
    edge_src = ndimage.gaussian_filter(np.nan_to_num(edge_src), 1.0)
    levels = _edge_levels(edge_src)
    win = _window(view.canonical(after))
    canon = [view.canonical(before), view.canonical(after)]
    out = []
    height = 3.3
    for orient, ratio in zip(_ORIENTS, view.width_ratios()):
        uris = []
        for vol in canon:
            fig = _new_fig(height * ratio, height)
            ax = fig.add_axes([0, 0, 1, 1])
            _grey(ax, view, vol, orient, win)
            if levels:
                ax.contour(view.plane(edge_src, orient), levels=levels, colors=_EDGE_COLOUR,
                           linewidths=0.8, origin="lower")
            _style_axis(ax)
            uris.append(to_data_uri(fig))
        out.append((view.title(orient), uris[0], uris[1], float(ratio)))
    return out


def dropout_figure(view: SliceView, *, corrected: np.ndarray, dropout_mask: np.ndarray | None,
                   retained_signal: np.ndarray | None, mask: np.ndarray | None = None) -> str:
    """Dropout mask (outlined and tinted) and retained-signal map over the corrected image.

    The retained-signal map (fraction 0-1) is shown inside ``mask`` where it is below 0.98.
    """
    ref = view.canonical(corrected)
    win = _window(ref)
    rows = [r for r, a in (("mask", dropout_mask), ("retained", retained_signal)) if a is not None]
    fig = _new_fig(9.6, 3.05 * len(rows))
    gs = fig.add_gridspec(len(rows), 3, width_ratios=view.width_ratios(), left=0.01, right=0.88,
                          bottom=0.02, top=1.0 - 0.09 / len(rows), wspace=0.04, hspace=0.16)
    for r, kind in enumerate(rows):
        axes = [fig.add_subplot(gs[r, c]) for c in range(3)]
        box = gs[r, 0].get_position(fig)
        if kind == "mask":
            dm = view.canonical(np.asarray(dropout_mask) > 0).astype(float)
            for ax, orient in zip(axes, _ORIENTS):
                _grey(ax, view, ref, orient, win)
                p = view.plane(dm, orient)
                ax.imshow(np.ma.masked_where(p < 0.5, p), cmap=ListedColormap([_DROPOUT_COLOUR]),
                          vmin=0, vmax=1,
                          origin="lower", aspect=view.aspect(orient), alpha=0.45,
                          interpolation="nearest")
                if p.any() and not p.all():
                    ax.contour(p, levels=[0.5], colors=_DROPOUT_COLOUR, linewidths=0.8,
                               origin="lower")
                _style_axis(ax, f"predicted dropout, {view.title(orient)}")
        else:
            rs = np.asarray(retained_signal, dtype=float)
            rs = view.canonical(rs if mask is None else np.where(np.asarray(mask) > 0, rs, np.nan))
            im = None
            for ax, orient in zip(axes, _ORIENTS):
                _grey(ax, view, ref, orient, win)
                p = view.plane(rs, orient)
                im = ax.imshow(np.ma.masked_where(~np.isfinite(p) | (p >= 0.98), p), cmap="inferno",
                               vmin=0, vmax=1, origin="lower", aspect=view.aspect(orient),
                               alpha=0.8, interpolation="nearest")
                _style_axis(ax, f"retained signal, {view.title(orient)}")
            cax = fig.add_axes([0.905, box.y0 + 0.05 * box.height, 0.018, 0.9 * box.height])
            cb = fig.colorbar(im, cax=cax)
            cb.set_label("retained signal (fraction)", color="#d8dee4", fontsize=8)
            cb.ax.tick_params(colors="#d8dee4", labelsize=7)
            cb.solids.set_alpha(1.0)
    return to_data_uri(fig)


def uncertainty_figure(view: SliceView, *, reference: np.ndarray, uncertainty: np.ndarray,
                       unit: str = "Hz", mask: np.ndarray | None = None) -> str:
    """Field uncertainty over the reference, three orientations, sequential scale."""
    ref = view.canonical(reference)
    unc = view.canonical(np.asarray(uncertainty, dtype=float))
    m = view.canonical(np.asarray(mask) > 0) if mask is not None else np.isfinite(unc)
    vals = unc[m & np.isfinite(unc)]
    hi = float(np.percentile(vals, 99)) if vals.size else 1.0
    hi = hi if hi > 0 else 1.0
    fig = _new_fig(9.6, 3.2)
    axes = _slice_row(fig, view, right=0.88)
    win = _window(ref)
    im = None
    for ax, orient in zip(axes, _ORIENTS):
        _grey(ax, view, ref, orient, win)
        p = view.plane(np.where(m, unc, np.nan), orient)
        im = ax.imshow(np.ma.masked_invalid(p), cmap="viridis", vmin=0, vmax=hi, origin="lower",
                       aspect=view.aspect(orient), alpha=0.75, interpolation="nearest")
        _style_axis(ax, view.title(orient))
    cax = fig.add_axes([0.905, 0.1, 0.018, 0.74])
    cb = fig.colorbar(im, cax=cax)
    cb.set_label(f"field uncertainty ({unit})", color="#d8dee4", fontsize=8)
    cb.ax.tick_params(colors="#d8dee4", labelsize=7)
    cb.solids.set_alpha(1.0)
    return to_data_uri(fig)


def pair_figure(view: SliceView, *, before: tuple[np.ndarray, np.ndarray],
                after: tuple[np.ndarray, np.ndarray], pe_axis: int,
                labels: tuple[str, str] = ("PE +", "PE -"),
                corr: tuple[float, float] | None = None) -> str:
    """Reversed-PE agreement: both polarities and their difference, before and after.

    The slice orientation is chosen so the PE axis lies in the image plane
    (axial unless PE is along z, then coronal).  Rows: as acquired, unwarped.
    """
    orient = "coronal" if view.canonical_axis(pe_axis) == 2 else "axial"
    fig = _new_fig(9.6, 6.2)
    win = _window(view.canonical(after[0]))
    diff_lim = 0.5 * (win[1] - win[0])
    gs = fig.add_gridspec(2, 3, left=0.09, right=0.88, bottom=0.02, top=0.92, wspace=0.04,
                          hspace=0.14)
    im = None
    for r, (pair, row) in enumerate(((before, "as acquired"), (after, "unwarped"))):
        a = view.plane(view.canonical(pair[0]), orient)
        b = view.plane(view.canonical(pair[1]), orient)
        for c, (img, title) in enumerate(((a, labels[0]), (b, labels[1]),
                                          (a - b, f"{labels[0]} − {labels[1]}"))):
            ax = fig.add_subplot(gs[r, c])
            if c < 2:
                ax.imshow(img, cmap="gray", vmin=win[0], vmax=win[1], origin="lower",
                          aspect=view.aspect(orient), interpolation="nearest")
            else:
                im = ax.imshow(img, cmap="PuOr_r", vmin=-diff_lim, vmax=diff_lim, origin="lower",
                               aspect=view.aspect(orient), interpolation="nearest")
            _style_axis(ax, title)
            if c == 0:
                txt = row if corr is None else f"{row}\nr = {corr[r]:.3f}"
                ax.text(-0.06, 0.5, txt, transform=ax.transAxes, rotation=90, ha="right",
                        va="center", color="#d8dee4", fontsize=8)
    cax = fig.add_axes([0.905, 0.1, 0.018, 0.74])
    cb = fig.colorbar(im, cax=cax)
    cb.set_label("difference (image units)", color="#d8dee4", fontsize=8)
    cb.ax.tick_params(colors="#d8dee4", labelsize=7)
    return to_data_uri(fig)
