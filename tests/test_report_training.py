"""training.png: tick labels never print over each other; the legends cover no curve."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from pipeline import report


def _history(decades: float, epochs: int = 40) -> list[dict]:
    """Losses that fall over ``decades`` decades and a KL that rises under its warm-up."""
    e = np.arange(1, epochs + 1)
    fall = 10 ** (-decades * (e - 1) / (epochs - 1))
    return [{"epoch": int(k), "train_loss": 50 * f, "val_loss": 55 * f, "train_recon": 40 * f,
             "val_recon": 44 * f, "train_kl": 0.2 + 3 * (1 - f), "val_kl": 0.25 + 3 * (1 - f),
             "kl_weight": min(1.0, k / 10)} for k, f in zip(e, fall)]


def _boxes(texts, renderer):
    return [t.get_window_extent(renderer) for t in texts if t.get_visible() and t.get_text()]


@pytest.mark.parametrize("decades", [0.3, 0.55, 1.0, 2.0, 4.0])
def test_tick_labels_never_overlap(decades):
    fig = report.training_figure(_history(decades), best_epoch=30)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    for ax in fig.axes:
        labels = [t for t in ax.yaxis.get_ticklabels(which="both")
                  if ax.get_ylim()[0] <= t.get_position()[1] <= ax.get_ylim()[1]]
        boxes = _boxes(labels, renderer)
        assert boxes, "an axis without a single number"
        for a, b in itertools.combinations(boxes, 2):
            assert not a.overlaps(b), (decades, ax.get_title())


def test_a_log_axis_spanning_under_a_decade_still_shows_several_numbers():
    fig = report.training_figure(_history(0.55))
    fig.canvas.draw()
    loss = fig.axes[0]
    assert loss.get_yscale() == "log"
    lo, hi = loss.get_ylim()
    shown = [t for t in loss.yaxis.get_ticklabels(which="both")
             if t.get_text() and lo <= t.get_position()[1] <= hi]
    assert len(shown) >= 2


def test_legends_sit_outside_every_plotting_area_and_inside_the_figure():
    fig = report.training_figure(_history(2.0), best_epoch=30)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    legends = [ax.get_legend() for ax in fig.axes if ax.get_legend() is not None]
    assert len(legends) == 3
    plots = [ax.get_window_extent(renderer) for ax in fig.axes]
    texts = [t for ax in fig.axes for t in (ax.xaxis.label, *ax.get_xticklabels())]
    page = fig.bbox
    for legend in legends:
        box = legend.get_window_extent(renderer)
        assert not any(box.overlaps(p) for p in plots)
        assert not any(box.overlaps(t) for t in _boxes(texts, renderer))
        assert page.x0 <= box.x0 and box.x1 <= page.x1 and page.y0 <= box.y0
    kl_labels = {t.get_text() for t in fig.axes[2].get_legend().get_texts()}
    assert kl_labels == {"training", "validation", "KL weight"}
