"""QC pages rendered from synthetic inputs: self-contained, small, cautioned, escaped."""

from __future__ import annotations

import base64
import io
import re

import numpy as np
import pytest
from PIL import Image

from epicorr.cli import CAUTION
from epicorr.report import (IndexFailure, index_rows, render_index, render_subject_page,
                            write_index, write_subject_page)

import _report_data as synth

DATA_URI = re.compile(r'src="data:(image/(?:png|jpeg));base64,([A-Za-z0-9+/=]+)"')


@pytest.fixture(scope="module")
def pages():
    rng = np.random.default_rng(20261201)
    good = synth.subject(rng, label="01", scale=1.0)
    bad = synth.subject(rng, label="02", scale=3.0, n_targets=2, pair=False)
    bad.failed_targets.append(("task-nback_bold", "sub-02_task-nback_bold.json: "
                               "EffectiveEchoSpacing=58.0: over 10 ms; BIDS wants seconds"))
    return {"good": good, "bad": bad, "good_html": render_subject_page(good),
            "bad_html": render_subject_page(bad)}


def _images(html):
    return [(mime, Image.open(io.BytesIO(base64.b64decode(data)))) for mime, data in
            DATA_URI.findall(html)]


@pytest.mark.parametrize("which", ["good_html", "bad_html"])
def test_subject_page_is_self_contained_small_and_cautioned(pages, which):
    html = pages[which]
    # Nothing fetched from the network: no http(s) URLs anywhere, every src is a data URI,
    # no external stylesheet or script.
    assert not re.search(r"https?://", html)
    assert not re.search(r"<link\b", html)
    srcs = re.findall(r'\bsrc="([^"]*)"', html)
    assert srcs and all(s.startswith("data:image/") for s in srcs)
    assert "<script src" not in html
    assert len(html.encode("utf-8")) < 5_000_000
    # The caution, verbatim, at the top and the bottom.
    assert html.count(CAUTION) == 2
    assert "not a medical device" in html and "anatomical reference" in html


def test_every_embedded_image_decodes(pages):
    imgs = _images(pages["good_html"])
    # Per target: 3 before/after pairs, field, histogram, dropout, uncertainty, pair figure.
    assert len(imgs) == 11
    for mime, im in imgs:
        im.load()
        assert im.width > 50 and im.height > 50
        assert (mime == "image/png") == (im.format == "PNG")


def test_before_after_images_have_identical_size(pages):
    imgs = [im for _, im in _images(pages["good_html"])][:6]
    for before, after in zip(imgs[0::2], imgs[1::2]):
        assert before.size == after.size
        assert np.asarray(before.convert("L")).tolist() != np.asarray(after.convert("L")).tolist()


def test_subject_page_content(pages):
    html, bad_html = pages["good_html"], pages["bad_html"]
    for text in ("Field strength in brain", "Fold-over voxels", "Predicted dropout",
                 "Pair agreement after", "Acquisition parameters used", "sidecar EffectiveEchoSpacing",
                 "fallback: image size along j", "epicorr run /data/study", 'type="range"',
                 "Opposite phase-encode agreement", "Uncertainty", "Thresholds:"):
        assert text in html, text
    assert "Opposite phase-encode agreement" not in bad_html  # no pair for that route
    assert "Field-map registration" in bad_html
    assert "EffectiveEchoSpacing=58.0" in bad_html and "Failed targets" in bad_html
    assert bad_html.count('class="card target"') == 2
    assert 'class="chip problem">problem' in bad_html


def test_template_output_is_escaped(pages):
    s = pages["good"]
    s.targets[0].name = '<script>alert("x")</script>'
    s.command_line = "epicorr run a b --note '<b>bold</b>'"
    html = render_subject_page(s)
    assert '<script>alert("x")</script>' not in html
    assert "&lt;script&gt;alert(" in html
    assert "&lt;b&gt;bold&lt;/b&gt;" in html


def test_minimal_target_renders_without_optional_sections(rng):
    t = synth.target(rng, pair=False, extras=False)
    s = synth.subject(rng)
    s.targets = [t]
    html = render_subject_page(s)
    assert "Signal dropout" not in html and "Uncertainty" not in html
    assert len(_images(html)) == 8


def test_write_subject_page_is_atomic_and_replaces(tmp_path, pages):
    path = tmp_path / "qc" / "sub-01.html"
    path.parent.mkdir()
    path.write_text("old")
    out = write_subject_page(path, pages["good"])
    assert out == path and path.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    assert sorted(p.name for p in path.parent.iterdir()) == ["sub-01.html"]  # no temp file left


def _index(pages):
    rows, fails = [], []
    for s in (pages["good"], pages["bad"]):
        r, f = index_rows(s, href=f"{s.label}.html")
        rows += r
        fails += f
    fails.append(IndexFailure(subject="sub-03", message="sub-03_bold.json: PhaseEncodingDirection="
                              "'y-': not a BIDS phase-encoding direction"))
    return rows, fails


def test_index_worst_first_with_failures_and_links(tmp_path, pages):
    rows, fails = _index(pages)
    html = render_index(rows, fails)
    assert CAUTION in html and not re.search(r"https?://", html)
    body = html.split('id="targets"')[1]
    order = re.findall(r'<td><a href="([^"]+)">(sub-\d+)</a></td>', body)
    assert [o[1] for o in order] == ["sub-02", "sub-02", "sub-01"]  # problems before the look
    assert order[0][0] == "sub-02.html#target-0"
    assert "PhaseEncodingDirection=&#39;y-&#39;" in html and "(whole subject)" in html
    assert "task-nback_bold" in html
    path = write_index(tmp_path / "qc" / "index.html", rows, fails, created="2026-12-01 12:00 UTC")
    assert path.read_text(encoding="utf-8") == render_index(rows, fails,
                                                            created="2026-12-01 12:00 UTC")


def test_index_sort_keys_are_numbers(pages):
    rows, fails = _index(pages)
    html = render_index(rows, fails)
    keys = re.findall(r'data-sort="([^"]*)"', html)
    assert keys and all(k == "" or np.isfinite(float(k)) for k in keys)


def test_index_accepts_metrics_read_back_from_json(pages):
    import dataclasses

    from epicorr.qcmetrics import Metric
    from epicorr.report import IndexRow

    rows = [dataclasses.asdict(m) for m in pages["good"].targets[0].metrics]
    rows[0]["value"] = None  # how JSON stores a metric that could not be computed
    metrics = [Metric.from_dict(r) for r in rows]
    html = render_index([IndexRow("sub-01", "task-rest_bold", metrics, "sub-01.html")])
    assert "n/a" in html


def test_typical_page_size_stays_well_under_5mb(rng):
    # A typical 3 T fMRI grid (96 x 96 x 60 voxels of 2.5 mm), every figure present.
    shape = (96, 96, 60)
    truth, brain = synth.head(rng, shape)
    fld = synth.field(shape)
    disp = -fld * synth.EES * shape[1]
    t = synth.target(rng)
    t.reference_before, t.reference_after = synth.distort(truth, disp), truth
    t.field_hz, t.displacement_vox, t.brain_mask, t.edges = fld, disp, brain, truth
    t.dropout_mask, t.retained_signal = brain & (fld > 60), np.clip(1 - np.abs(fld) / 250, 0, 1)
    t.uncertainty = 2.0 + np.abs(np.gradient(fld, axis=1))
    t.pair_before = (synth.distort(truth, disp), synth.distort(truth, -disp))
    t.pair_after = (truth, truth + rng.normal(0, 5, shape))
    t.voxel_size_mm, t.affine = (2.5, 2.5, 2.5), np.diag([2.5, 2.5, 2.5, 1.0])
    s = synth.subject(rng)
    s.targets = [t]
    size = len(render_subject_page(s).encode("utf-8"))
    assert size < 1_500_000, size  # the brief asks for well under 5 MB


def test_pair_figure_on_its_own_grid(rng):
    # The reversed-PE images may sit on another grid (the fmap acquisition's): the figure and
    # its agreement numbers use that grid and mask, not the target's.
    t = synth.target(rng, pair=False, extras=False)
    shape = (30, 36, 20)
    truth, brain = synth.head(rng, shape)
    disp = -synth.field(shape) * synth.EES * shape[1]
    t.pair_before = (synth.distort(truth, disp), synth.distort(truth, -disp))
    t.pair_after = (truth, truth)
    t.pair_affine, t.pair_mask, t.pair_pe_axis = np.diag([3.0, 3.0, 3.0, 1.0]), brain, 1
    s = synth.subject(rng)
    s.targets = [t]
    html = render_subject_page(s)
    found = re.findall(r"on the grid of the reversed-PE images (-?[0-9]+\.[0-9]+) → (-?[0-9]+\.[0-9]+)", html)
    assert len(found) == 1, found
    before, after = (float(x) for x in found[0])
    # Identical unwarped images correlate exactly (Pearson r = 1); the distorted ones less.
    assert after == 1.0 and before < 0.99
    assert "Opposite phase-encode agreement" in html
