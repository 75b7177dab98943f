"""The VAE over [0, 1] log-magnitude spectrograms, and its loss.

Frequency bins are the channels of 1-D convolutions over time: a 1x1 projection
from ``n_bins`` to ``width`` learns a spectral basis per frame, stride-2 time
convolutions summarise the envelope, a linear layer gives the posterior. The
decoder mirrors it (nearest-neighbour upsampling + convolution, to the exact frame
count of each encoder level) and ends in a 1x1 projection back to the bins and a
sigmoid, so the output lies in [0, 1]. Every layer is a dense GEMM on a CPU; the
benchmark (tests/benchmarks/bench_train.py) compares it with strided 2-D convs.

The loss per clip is ``recon + kl_weight * KL`` with ``recon`` the (level-weighted)
squared error summed over bins x frames and ``KL`` summed over latent dimensions
(nats). Summing both keeps them on the scale of a Gaussian decoder with variance
1/2 (up to a constant), so ``beta = 1`` is the plain VAE objective.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import torch
from torch import nn
from torch.nn import functional as F

from pipeline.config import AudioSpec, ModelSpec

LOGVAR_LIMIT = 10.0  # soft bound on log-variance: sigma in [0.0067, 148]; keeps exp() finite


def frame_levels(n_frames: int, depth: int) -> list[int]:
    """Frame counts at each encoder level: ``[n_frames, ceil(n/2), ...]`` (depth + 1 values)."""
    levels = [n_frames]
    for _ in range(depth):
        levels.append((levels[-1] + 1) // 2)
    return levels


class ShotVAE(nn.Module):
    """Convolutional VAE for ``(B, n_bins, n_frames)`` spectrograms in [0, 1].

    Parameters
    ----------
    n_bins, n_frames : int
        Input shape, from :class:`~pipeline.config.AudioSpec`.
    latent_dim, width, depth, kernel_size : int
        From :class:`~pipeline.config.ModelSpec`.
    """

    def __init__(
        self,
        *,
        n_bins: int,
        n_frames: int,
        latent_dim: int,
        width: int,
        depth: int,
        kernel_size: int,
    ) -> None:
        super().__init__()
        self.n_bins, self.n_frames, self.latent_dim = n_bins, n_frames, latent_dim
        self.levels = frame_levels(n_frames, depth)
        k, w = kernel_size, width

        # no normalisation layers: per-clip level and decay are what the code must
        # carry, and GroupNorm over (channels, time) divides them out (measured:
        # 1.6 dB lower validation error without it on a synthetic bank)
        def block(conv: nn.Module) -> nn.Sequential:
            return nn.Sequential(conv, nn.SiLU())

        self.enc_in = block(nn.Conv1d(n_bins, w, 1))
        self.enc_down = nn.ModuleList(
            block(nn.Conv1d(w, w, k, stride=2, padding=k // 2)) for _ in range(depth)
        )
        flat = w * self.levels[-1]
        self.to_posterior = nn.Linear(flat, 2 * latent_dim)
        self.from_latent = nn.Linear(latent_dim, flat)
        self.dec_up = nn.ModuleList(block(nn.Conv1d(w, w, k, padding=k // 2)) for _ in range(depth))
        self.dec_out = nn.Conv1d(w, n_bins, 1)
        # a learned (bins, frames) logit template the network adds detail to;
        # training starts it at the logit of the training set's mean spectrogram
        self.template = nn.Parameter(torch.zeros(n_bins, n_frames))

    def encode(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Posterior mean and log-variance, each ``(B, latent_dim)``."""
        h = self.enc_in(x)  # (B, W, T)
        for layer in self.enc_down:
            h = layer(h)  # (B, W, ceil(T/2))
        mu, raw = self.to_posterior(h.flatten(1)).chunk(2, dim=1)
        logvar = LOGVAR_LIMIT * torch.tanh(raw / LOGVAR_LIMIT)
        return mu, logvar

    def decode(self, z: torch.Tensor) -> torch.Tensor:
        """``(B, latent_dim)`` codes to ``(B, n_bins, n_frames)`` spectrograms in [0, 1]."""
        h = self.from_latent(z).view(z.shape[0], -1, self.levels[-1])  # (B, W, T_L)
        h = F.silu(h)
        for layer, size in zip(self.dec_up, reversed(self.levels[:-1])):
            # nearest upsampling + conv instead of a transposed conv: no checkerboard
            # artefacts (Odena, Dumoulin, Olah 2016, "Deconvolution and Checkerboard Artifacts")
            h = layer(F.interpolate(h, size=size, mode="nearest"))  # (B, W, size)
        return torch.sigmoid(self.dec_out(h) + self.template)  # (B, F, T)

    def forward(
        self, x: torch.Tensor, *, sample: bool | None = None, eps: torch.Tensor | None = None
    ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor]:
        """Return ``(x_hat, mu, logvar, z)``.

        ``z`` is a reparameterised sample when ``sample`` (default: in training
        mode), else the posterior mean; ``eps`` is its standard normal noise
        (default: drawn from torch's global generator).
        """
        mu, logvar = self.encode(x)
        if sample is None:
            sample = self.training
        z = reparameterize(mu, logvar, eps) if sample else mu
        return self.decode(z), mu, logvar, z


def build_model(audio: AudioSpec, spec: ModelSpec) -> ShotVAE:
    """The VAE for ``audio``'s input shape and ``spec``'s size."""
    return ShotVAE(
        n_bins=audio.n_bins,
        n_frames=audio.n_frames,
        latent_dim=spec.latent_dim,
        width=spec.width,
        depth=spec.depth,
        kernel_size=spec.kernel_size,
    )


def count_parameters(model: nn.Module) -> int:
    return sum(p.numel() for p in model.parameters())


def reparameterize(
    mu: torch.Tensor, logvar: torch.Tensor, eps: torch.Tensor | None = None
) -> torch.Tensor:
    """``z = mu + sigma * eps``, ``eps ~ N(0, I)`` (Kingma & Welling 2014, section 2.4)."""
    if eps is None:
        eps = torch.randn_like(mu)
    return mu + torch.exp(0.5 * logvar) * eps


def kl_per_dim(mu: torch.Tensor, logvar: torch.Tensor) -> torch.Tensor:
    """Elementwise ``KL(N(mu, sigma^2) || N(0, 1))`` in nats, shape of ``mu``.

    Closed form of Kingma & Welling 2014, Appendix B:
    ``-0.5 * (1 + log sigma^2 - mu^2 - sigma^2)``.
    """
    return 0.5 * (mu.pow(2) + logvar.exp() - 1.0 - logvar)


def kl_term(kl: torch.Tensor, *, free_bits: float = 0.0) -> torch.Tensor:
    """The KL part of the objective from per-dimension KL ``(B, D)``.

    With ``free_bits > 0`` each dimension's batch-mean KL is held at a floor of
    ``free_bits`` nats, so dimensions below it get no gradient (Kingma et al. 2016,
    "Improved Variational Inference with Inverse Autoregressive Flow").
    """
    per_dim = kl.mean(dim=0)  # (D,)
    if free_bits > 0:
        per_dim = torch.clamp(per_dim, min=free_bits)
    return per_dim.sum()


def recon_error(x_hat: torch.Tensor, x: torch.Tensor, *, loud_weight: float = 0.0) -> torch.Tensor:
    """Per-clip weighted squared error summed over bins x frames, shape ``(B,)``.

    The weight ``1 + loud_weight * max(x, x_hat)`` puts the loud parts (attacks,
    strong partials, usually the low bins of a hit) ahead of the noise floor, for
    missed energy and for spurious energy alike. The weight is not differentiated.
    """
    err = (x_hat - x).pow(2)
    if loud_weight > 0:
        err = err * (1.0 + loud_weight * torch.maximum(x, x_hat.detach()))
    return err.flatten(1).sum(dim=1)


MIN_LOG_SIGMA2 = math.log(1e-3**2)  # the calibrated decoder's floor: sigma >= 0.001 (0.1 dB)


def calibrated_nll(
    sse: torch.Tensor, n_values: int, mean_sse: torch.Tensor | None = None
) -> torch.Tensor:
    """Per-clip Gaussian negative log-likelihood at the best shared variance, ``(B,)``.

    A calibrated decoder (Rybkin, Daniilidis & Levine 2021, "Simple and Effective VAE
    Training with Calibrated Decoders"): the decoder is N(x_hat, sigma^2 I) with one
    sigma^2 for the batch, set to its maximum-likelihood value ``mean(sse) / n_values``.
    Then ``-log p(x|z) = n/2 log(2 pi sigma^2) + sse / (2 sigma^2)``: the reconstruction
    is weighed against the KL by how well the model already fits, with no fixed variance
    (no hand-set beta) deciding it. ``log sigma^2`` is floored at :data:`MIN_LOG_SIGMA2`.

    sigma^2 is not differentiated: at its maximum-likelihood value the objective's
    derivative with respect to it is zero, so the gradient is the same, and a batch
    split over several processes gets the same sigma^2 from ``mean_sse``, the whole
    batch's mean (default: ``sse.mean()``).
    """
    mean_sse = sse.detach().mean() if mean_sse is None else mean_sse.detach()
    log_s2 = torch.clamp(torch.log(mean_sse / n_values), min=MIN_LOG_SIGMA2)
    return 0.5 * n_values * (math.log(2.0 * math.pi) + log_s2) + 0.5 * sse / log_s2.exp()


def vae_loss(
    x_hat: torch.Tensor,
    x: torch.Tensor,
    mu: torch.Tensor,
    logvar: torch.Tensor,
    *,
    kl_weight: float,
    free_bits: float = 0.0,
    loud_weight: float = 0.0,
    calibrated: bool = False,
    batch_mean: Callable[[torch.Tensor], torch.Tensor] | None = None,
) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """The negative ELBO per clip (batch mean): ``(loss, recon, kl)``.

    ``loss = recon + kl_weight * kl_term`` (Kingma & Welling 2014; the weight is
    beta of Higgins et al. 2017 during warm-up). ``recon`` is the weighted squared
    error summed over bins x frames (a Gaussian decoder of fixed variance 1/2, up to a
    constant) or, with ``calibrated``, :func:`calibrated_nll`. ``kl`` is the true
    batch-mean KL, without the free-bits floor; ``recon`` and ``kl`` are detached.
    ``batch_mean`` maps per-clip values to the mean over the whole batch (under
    ``torch.distributed``, over every rank's share of it; default: this batch's mean):
    the calibrated variance uses it.
    """
    sse = recon_error(x_hat, x, loud_weight=loud_weight)
    mean_sse = None if batch_mean is None or not calibrated else batch_mean(sse.detach())
    rec = (calibrated_nll(sse, x[0].numel(), mean_sse) if calibrated else sse).mean()
    kl = kl_per_dim(mu, logvar)
    loss = rec + kl_weight * kl_term(kl, free_bits=free_bits)
    return loss, rec.detach(), kl.sum(dim=1).mean().detach()


@torch.no_grad()
def init_template(model: ShotVAE, mean_spectrogram: torch.Tensor, *, eps: float = 1e-3) -> None:
    """Start the output template at ``logit(mean)``, so step 0 predicts the mean clip."""
    m = mean_spectrogram.clamp(eps, 1 - eps)
    model.template.copy_(torch.log(m) - torch.log1p(-m))


@torch.no_grad()
def encode_all(
    model: ShotVAE, spectra: np.ndarray, *, batch_size: int = 128,
    device: str | torch.device = "cpu",
) -> tuple[np.ndarray, np.ndarray]:
    """Posterior ``(mu, logvar)``, float32 ``(N, D)``, of every row of ``spectra`` (or a memmap)."""
    model.eval()
    dim = model.latent_dim
    mu_all = np.empty((len(spectra), dim), dtype=np.float32)
    lv_all = np.empty((len(spectra), dim), dtype=np.float32)
    # written into arrays made up front: a small result kept from every batch, between the
    # batches' large temporaries, fragmented the heap (about 400 MB held after 100,000 clips)
    for i in range(0, len(spectra), batch_size):
        x = torch.from_numpy(np.array(spectra[i : i + batch_size], dtype=np.float32)).to(device)
        mu, lv = model.encode(x)
        mu_all[i : i + len(x)] = mu.cpu().numpy()
        lv_all[i : i + len(x)] = lv.cpu().numpy()
        del x, mu, lv
    model.train()
    return mu_all, lv_all
