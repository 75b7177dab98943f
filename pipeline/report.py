"""Figures for ``shotsmith inspect``: latent map, reconstructions, training curves.

Pure functions: arrays in, one PNG out. Every figure has a fixed pixel size
(``figsize * dpi``, no tight bounding box, which would change it), so scripts and
tests can rely on it. matplotlib is imported inside the functions and drives
the Agg canvas directly (no pyplot, no global state), so importing this module
costs nothing and works without a display.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from pipeline import files

if TYPE_CHECKING:
    from pipeline.config import AudioSpec

DPI = 100
LATENT_MAP_SIZE = (900, 800)  # pixels (width, height)
TRAINING_SIZE = (1350, 450)
RECON_WIDTH = 1350
RECON_ROW_HEIGHT = 260
RECON_HEADER = 70
NO_CATEGORY = "(none)"  # as pipeline.latent labels uncategorised clips


def reconstructions_size(n_clips: int) -> tuple[int, int]:
    """Pixel size (width, height) of :func:`plot_reconstructions` for ``n_clips`` rows."""
    return RECON_WIDTH, RECON_HEADER + RECON_ROW_HEIGHT * max(int(n_clips), 1)


def _figure(size: tuple[int, int]):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(size[0] / DPI, size[1] / DPI), dpi=DPI)
    FigureCanvasAgg(fig)
    return fig


def _save(fig, path: Path) -> Path:
    """Render the PNG in memory, then write it whole (:func:`pipeline.files.write_atomic`)."""
    import io

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    return files.write_atomic(Path(path), buf.getbuffer())


def pca_axes(X: np.ndarray, n_components: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """Principal directions of ``X`` (N, D) via SVD of the centred data.

    Returns
    -------
    components : np.ndarray [shape=(n_components, D)], orthonormal rows
    explained : np.ndarray [shape=(n_components,)], share of the variance (0..1)
    """
    X = np.asarray(X, dtype=np.float64)
    k = min(n_components, X.shape[1])
    Xc = X - X.mean(axis=0, keepdims=True)
    _, s, vt = np.linalg.svd(Xc, full_matrices=False)
    total = float(np.sum(s**2))
    var = s[:k] ** 2
    explained = var / total if total > 0 else np.zeros(k)
    comps = vt[:k]
    if comps.shape[0] < k:  # fewer clips than dimensions asked for
        comps = np.vstack([comps, np.zeros((k - comps.shape[0], X.shape[1]))])
        explained = np.concatenate([explained, np.zeros(k - len(explained))])
    # sign convention: the largest loading of each direction is positive (repeatable figures)
    signs = np.sign(comps[np.arange(k), np.argmax(np.abs(comps), axis=1)])
    return comps * np.where(signs == 0, 1.0, signs)[:, None], explained


def _category_labels(categories: Sequence[str | None]) -> list[str]:
    return [NO_CATEGORY if c in (None, "") else str(c) for c in categories]


def plot_latent_map(
    mu: np.ndarray,
    categories: Sequence[str | None],
    prior_samples: np.ndarray,
    path: Path,
    *,
    title: str | None = None,
) -> Path:
    """Scatter of the clips' posterior means in 2-D, coloured by category.

    With more than two latent dimensions the codes are projected on their first
    two principal directions; the projection goes through the origin (no
    centring), so the origin stays at (0, 0) and prior samples, projected on the
    same orthonormal directions, stay N(0, I) in the picture. With one or two
    dimensions the raw axes are shown.

    Parameters
    ----------
    mu : np.ndarray [shape=(N, D)]
    categories : sequence of str or None, length N
    prior_samples : np.ndarray [shape=(M, D)], drawn as ``generate`` draws (the fitted
        mixture by default)
    path : Path of the PNG (``LATENT_MAP_SIZE`` pixels)
    """
    mu = np.asarray(mu, dtype=np.float64)
    prior = np.asarray(prior_samples, dtype=np.float64).reshape(-1, mu.shape[1])
    labels = _category_labels(categories)
    if len(labels) != len(mu):
        raise ValueError("one category per code is required")
    d = mu.shape[1]
    if d == 1:
        P, Q = np.c_[mu, np.zeros(len(mu))], np.c_[prior, np.zeros(len(prior))]
        xlabel, ylabel = "z1", "(one-dimensional latent)"
    elif d == 2:
        P, Q = mu, prior
        xlabel, ylabel = "z1", "z2"
    else:
        comps, explained = pca_axes(mu, 2)
        P, Q = mu @ comps.T, prior @ comps.T
        xlabel = f"PC1 ({100 * explained[0]:.1f} % of variance)"
        ylabel = f"PC2 ({100 * explained[1]:.1f} % of variance)"

    fig = _figure(LATENT_MAP_SIZE)
    ax = fig.add_axes((0.09, 0.08, 0.62, 0.84))
    if len(Q):
        ax.scatter(Q[:, 0], Q[:, 1], s=6, c="0.55", alpha=0.18, linewidths=0,
                   label=f"samples as generate draws them ({len(Q)})", zorder=1)
    from matplotlib import colormaps

    names = sorted(set(labels), key=lambda c: (c == NO_CATEGORY, c))
    cmap = colormaps["tab10" if len(names) <= 10 else "tab20"]
    lab = np.array(labels, dtype=object)
    for i, name in enumerate(names):
        sel = lab == name
        ax.scatter(P[sel, 0], P[sel, 1], s=22, color=cmap(i % cmap.N), alpha=0.9,
                   edgecolors="white", linewidths=0.4, label=f"{name} ({int(sel.sum())})",
                   zorder=3)
    ax.scatter([0.0], [0.0], marker="+", s=260, c="black", linewidths=2.0, label="origin",
               zorder=4)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.set_title(title or f"Latent map: {len(mu)} clips, {d}-D latent")
    ax.grid(True, alpha=0.25)
    ax.set_aspect("equal", adjustable="datalim")
    ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=8, frameon=False,
              ncol=1 if len(names) <= 24 else 2)
    return _save(fig, path)


def _time_freq_extent(audio: AudioSpec, n_bins: int, n_frames: int) -> tuple[float, ...]:
    # centred frames: frame t sits at t * hop / sr seconds; bin k at k * sr / n_fft Hz
    dt = audio.hop_length / audio.sample_rate
    df = audio.sample_rate / audio.n_fft
    return (-dt / 2, (n_frames - 0.5) * dt, -df / 2, (n_bins - 0.5) * df)


def plot_reconstructions(
    originals: np.ndarray,
    reconstructions: np.ndarray,
    names: Sequence[str],
    audio_spec: AudioSpec,
    path: Path,
    *,
    title: str | None = None,
) -> Path:
    """Original, reconstruction and difference log-spectrograms, one row per clip.

    Parameters
    ----------
    originals, reconstructions : np.ndarray [shape=(K, bins, frames)], [0, 1] bank scale
        ``originals`` may be None: the row then shows the reconstruction only.
    names : sequence of str, length K (row labels)
    audio_spec : AudioSpec that fixes the dB scale and the time/frequency axes
    path : Path of the PNG (:func:`reconstructions_size` pixels)
    """
    from pipeline.spectra import unit_to_db

    R = np.asarray(reconstructions, dtype=np.float32)
    Orig = None if originals is None else np.asarray(originals, dtype=np.float32)
    if Orig is not None and Orig.shape != R.shape:
        raise ValueError(f"originals {Orig.shape} and reconstructions {R.shape} differ in shape")
    k = len(R)
    lo, hi = audio_spec.db_floor, audio_spec.db_ceiling
    to_db = lambda U: unit_to_db(U, db_floor=lo, db_ceiling=hi)  # noqa: E731
    extent = _time_freq_extent(audio_spec, R.shape[1], R.shape[2]) if k else None
    diff_db = [] if Orig is None else [to_db(R[i]) - to_db(Orig[i]) for i in range(k)]
    span = max([float(np.max(np.abs(x))) for x in diff_db] + [1.0])
    span = float(min(span, hi - lo))

    size = reconstructions_size(k)
    fig = _figure(size)
    top = 1.0 - RECON_HEADER / size[1]
    gs = fig.add_gridspec(max(k, 1), 3, left=0.07, right=0.93, bottom=45 / size[1],
                          top=top, wspace=0.28, hspace=0.45)
    fig.suptitle(title or "Held-out clips: original, reconstruction (decoded), difference",
                 y=1.0 - 0.35 * RECON_HEADER / size[1], fontsize=12)
    if k == 0:
        ax = fig.add_subplot(gs[0, :])
        ax.axis("off")
        ax.text(0.5, 0.5, "no clips to show", ha="center", va="center")
        return _save(fig, path)
    kw = dict(origin="lower", aspect="auto", extent=extent, interpolation="nearest")
    for i in range(k):
        panels = [
            ("original", None if Orig is None else to_db(Orig[i]), "magma", lo, hi),
            ("reconstruction", to_db(R[i]), "magma", lo, hi),
            ("reconstruction - original",
             None if Orig is None else diff_db[i], "RdBu_r", -span, span),
        ]
        for j, (what, img, cmap, vmin, vmax) in enumerate(panels):
            ax = fig.add_subplot(gs[i, j])
            if img is None:
                ax.axis("off")
                ax.text(0.5, 0.5, f"{what}:\nneeds the bank (--bank)", ha="center",
                        va="center", transform=ax.transAxes, color="0.4")
                continue
            im = ax.imshow(img, cmap=cmap, vmin=vmin, vmax=vmax, **kw)
            ax.set_title(f"{names[i]}: {what}" if j == 0 else what, fontsize=9, loc="left")
            ax.set_xlabel("time (s)", fontsize=8)
            if j == 0:
                ax.set_ylabel("frequency (Hz)", fontsize=8)
            ax.tick_params(labelsize=7)
            cb = fig.colorbar(im, ax=ax, pad=0.02, fraction=0.05)
            cb.set_label("dB" if j < 2 else "dB difference", fontsize=7)
            cb.ax.tick_params(labelsize=7)
    return _save(fig, path)


def _series(history: Sequence[dict[str, Any]], *keys: str) -> np.ndarray:
    """First of ``keys`` present per epoch, NaN where missing or not a number."""
    out = np.full(len(history), np.nan)
    for i, h in enumerate(history):
        for key in keys:
            v = h.get(key)
            if isinstance(v, (int, float)) and not isinstance(v, bool):
                out[i] = float(v)
                break
    return out


# key spellings accepted per curve: (train, validation)
HISTORY_KEYS = {
    "loss": (("train_loss", "loss"), ("val_loss",)),
    "reconstruction": (("train_recon", "recon"), ("val_recon",)),
    "KL": (("train_kl", "kl"), ("val_kl",)),
}


def plot_training(history: Sequence[dict[str, Any]], path: Path, *,
                  best_epoch: int | None = None, title: str | None = None) -> Path:
    """Training and validation loss, reconstruction and KL parts per epoch, as a PNG.

    Parameters
    ----------
    history : sequence of per-epoch dicts (``epoch``, ``train_loss``, ``val_loss``,
        ``train_recon``, ``val_recon``, ``train_kl``, ``val_kl``; ``beta`` or
        ``kl_weight`` when present is drawn on the KL panel)
    path : Path of the PNG (``TRAINING_SIZE`` pixels)
    best_epoch : int, optional. The epoch whose weights were kept (a vertical line)
    """
    return _save(training_figure(history, best_epoch=best_epoch, title=title), path)


# minor ticks labelled on a log axis, by the decades it spans: every label stays apart
_MINOR_LABELS = ((0.6, (2, 3, 5)), (2.5, (2, 5)))


def _log_tick_formatter(ax, *, minor: bool):
    """Plain numbers (``0.2``, not ``2x10^-1``); minor ticks only at the mantissas
    :data:`_MINOR_LABELS` allows for the axis's span, so labels never print over each other."""
    import math

    from matplotlib.ticker import FuncFormatter

    def fmt(v: float, _pos: int) -> str:
        if not minor:
            return f"{v:g}"
        lo, hi = ax.get_ylim()
        span = math.log10(hi / lo) if 0 < lo < hi else math.inf
        keep = next((m for limit, m in _MINOR_LABELS if span < limit), ())
        mantissa = v / 10.0 ** math.floor(math.log10(v) + 1e-9)
        return f"{v:g}" if any(abs(mantissa - m) < 1e-6 for m in keep) else ""

    return FuncFormatter(fmt)


def training_figure(history: Sequence[dict[str, Any]], *, best_epoch: int | None = None,
                    title: str | None = None):
    """The figure :func:`plot_training` saves (a matplotlib ``Figure`` on the Agg canvas).

    The legends sit below the panels, outside the plotting area, so no curve is covered.
    """
    from matplotlib.ticker import MaxNLocator

    history = list(history or [])
    fig = _figure(TRAINING_SIZE)
    fig.suptitle(title or f"Training: {len(history)} epochs", fontsize=12)
    epochs = _series(history, "epoch")
    epochs = np.where(np.isnan(epochs), np.arange(1, len(history) + 1), epochs)
    axes = [fig.add_axes((0.05 + 0.33 * i, 0.25, 0.25, 0.6)) for i in range(3)]
    for ax, (name, (tkeys, vkeys)) in zip(axes, HISTORY_KEYS.items(), strict=True):
        drawn, values = False, []
        for keys, label, style in ((tkeys, "training", "-"), (vkeys, "validation", "--")):
            y = _series(history, *keys)
            ok = np.isfinite(y)
            if ok.any():
                ax.plot(epochs[ok], y[ok], style, marker="." if ok.sum() < 30 else None,
                        label=label)
                drawn = True
                values.append(y[ok])
        v = np.concatenate(values) if values else np.zeros(0)
        if v.size and v.min() > 0 and v.max() > 3 * v.min():  # early epochs would flatten the rest
            ax.set_yscale("log")
            ax.yaxis.set_major_formatter(_log_tick_formatter(ax, minor=False))
            ax.yaxis.set_minor_formatter(_log_tick_formatter(ax, minor=True))
        if best_epoch is not None and drawn:
            ax.axvline(best_epoch, color="0.3", lw=0.8, alpha=0.6,
                       label="kept epoch" if name == "loss" else None)
        handles, labels = ax.get_legend_handles_labels()
        if name == "KL":
            w = _series(history, "kl_weight", "beta")
            if np.isfinite(w).any():
                tw = ax.twinx()
                (line,) = tw.plot(epochs, w, ":", color="0.4", label="KL weight")
                tw.set_ylabel("KL weight", fontsize=8, color="0.4")
                tw.set_ylim(0, 1.05 * max(float(np.nanmax(w)), 1e-3))
                tw.tick_params(labelsize=7, colors="0.4")
                handles, labels = handles + [line], labels + ["KL weight"]
        ax.set_title(name, fontsize=10)
        ax.set_xlabel("epoch", fontsize=9)
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.grid(True, alpha=0.25)
        ax.tick_params(which="both", labelsize=8)
        if drawn:  # below the "epoch" label, outside the plotting area
            ax.legend(handles, labels, fontsize=8, frameon=False, loc="upper center",
                      bbox_to_anchor=(0.5, -0.17), ncol=len(handles), handlelength=1.6,
                      columnspacing=1.0)
        else:
            ax.text(0.5, 0.5, "not recorded", ha="center", va="center",
                    transform=ax.transAxes, color="0.4")
    axes[0].set_ylabel("per-clip loss")
    return fig
