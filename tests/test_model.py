"""The VAE and its loss: published formulas, shapes, ranges, gradients."""

from __future__ import annotations

import pytest
import torch

from pipeline.config import load_settings
from pipeline.model import (
    ShotVAE,
    build_model,
    frame_levels,
    init_template,
    kl_per_dim,
    kl_term,
    recon_error,
    reparameterize,
    vae_loss,
)


def small_model(n_bins: int = 33, n_frames: int = 21, latent_dim: int = 4) -> ShotVAE:
    torch.manual_seed(0)
    return ShotVAE(n_bins=n_bins, n_frames=n_frames, latent_dim=latent_dim, width=16, depth=2,
                   kernel_size=3)


# ----------------------------------------------------------------------------- KL


def test_closed_form_kl_equals_torch_distributions():
    # Kingma & Welling 2014, Appendix B, against torch.distributions' _kl_normal_normal,
    # elementwise, summed over latent dimensions, in float64
    g = torch.Generator().manual_seed(1)
    mu = 2 * torch.randn(64, 12, generator=g, dtype=torch.float64)
    logvar = 3 * torch.randn(64, 12, generator=g, dtype=torch.float64)
    ours = kl_per_dim(mu, logvar).sum(-1)
    q = torch.distributions.Normal(mu, torch.exp(0.5 * logvar))
    p = torch.distributions.Normal(torch.zeros_like(mu), torch.ones_like(mu))
    ref = torch.distributions.kl_divergence(q, p).sum(-1)
    torch.testing.assert_close(ours, ref, rtol=1e-10, atol=1e-10)


def test_kl_is_zero_at_the_prior_and_positive_elsewhere():
    z = torch.zeros(3, 5, dtype=torch.float64)
    assert torch.equal(kl_per_dim(z, z), z)
    g = torch.Generator().manual_seed(2)
    mu, logvar = torch.randn(100, 5, generator=g), torch.randn(100, 5, generator=g)
    assert (kl_per_dim(mu, logvar) > 0).all()


def test_kl_matches_a_monte_carlo_estimate():
    # KL = E_q[log q(z) - log p(z)]: 1e5 draws, within 4 standard errors
    mu = torch.tensor([0.7, -1.2, 0.0], dtype=torch.float64)
    logvar = torch.tensor([-1.0, 0.5, -2.5], dtype=torch.float64)
    q = torch.distributions.Normal(mu, torch.exp(0.5 * logvar))
    p = torch.distributions.Normal(torch.zeros(3, dtype=torch.float64), 1.0)
    torch.manual_seed(3)
    z = q.sample((100_000,))
    terms = (q.log_prob(z) - p.log_prob(z)).sum(-1)
    se = terms.std() / len(terms) ** 0.5
    assert abs(terms.mean() - kl_per_dim(mu, logvar).sum()) < 4 * se


# --------------------------------------------------------------- reparameterisation


def test_reparameterised_samples_have_the_posterior_moments():
    # z = mu + sigma * eps (Kingma & Welling 2014, section 2.4). n = 200000 draws:
    # the sample mean is within 4 sigma / sqrt(n) of mu, the sample variance within
    # 4 * sigma^2 * sqrt(2 / (n - 1)) of sigma^2 (normal-theory standard errors)
    n = 200_000
    mu = torch.tensor([1.5, -0.3, 0.0, 4.0], dtype=torch.float64)
    logvar = torch.tensor([0.0, -2.0, 1.2, -4.0], dtype=torch.float64)
    torch.manual_seed(4)
    z = reparameterize(mu.expand(n, 4), logvar.expand(n, 4))
    var = logvar.exp()
    assert (abs(z.mean(0) - mu) < 4 * (var / n).sqrt()).all()
    assert (abs(z.var(0) - var) < 4 * var * (2 / (n - 1)) ** 0.5).all()


def test_gradients_reach_mu_and_logvar():
    mu = torch.tensor([0.5, -1.0], requires_grad=True)
    logvar = torch.tensor([-0.4, 0.8], requires_grad=True)
    eps = torch.tensor([1.3, -0.7])
    reparameterize(mu, logvar, eps).sum().backward()
    # dz/dmu = 1, dz/dlogvar = 0.5 * sigma * eps
    torch.testing.assert_close(mu.grad, torch.ones(2))
    torch.testing.assert_close(logvar.grad, 0.5 * torch.exp(0.5 * logvar.detach()) * eps)


def test_gradients_reach_the_encoder_through_the_sample():
    model = small_model()
    x = torch.rand(3, 33, 21)
    x_hat, mu, logvar, z = model(x)
    mu.retain_grad()
    logvar.retain_grad()
    loss, _, _ = vae_loss(x_hat, x, mu, logvar, kl_weight=1.0)
    loss.backward()
    assert mu.grad.abs().sum() > 0 and logvar.grad.abs().sum() > 0
    assert model.enc_in[0].weight.grad.abs().sum() > 0


# ------------------------------------------------------------------------ free bits


def test_free_bits_give_no_kl_gradient_below_the_floor():
    # Kingma et al. 2016: each dimension's batch-mean KL is held at lambda; below it
    # the KL term does not move the encoder
    model = small_model()
    x = torch.rand(8, 33, 21)
    mu, logvar = model.encode(x)
    kl = kl_per_dim(mu, logvar)
    floor = kl.detach().mean(0).max().item() + 1.0
    term = kl_term(kl, free_bits=floor)
    assert term.item() == pytest.approx(floor * kl.shape[1])
    grads = torch.autograd.grad(term, list(model.parameters()), allow_unused=True)
    assert all(g is None or g.abs().max() == 0 for g in grads)
    grads = torch.autograd.grad(kl_term(kl_per_dim(*model.encode(x)), free_bits=0.0),
                                [model.to_posterior.weight])
    assert grads[0].abs().max() > 0


def test_free_bits_zero_is_the_plain_batch_mean_kl():
    g = torch.Generator().manual_seed(5)
    kl = kl_per_dim(torch.randn(6, 3, generator=g), torch.randn(6, 3, generator=g))
    torch.testing.assert_close(kl_term(kl, free_bits=0.0), kl.sum(1).mean())


# --------------------------------------------------------------------- reconstruction


def test_recon_error_is_summed_squared_error_without_weighting():
    g = torch.Generator().manual_seed(6)
    x, x_hat = torch.rand(4, 5, 7, generator=g), torch.rand(4, 5, 7, generator=g)
    torch.testing.assert_close(recon_error(x_hat, x), ((x_hat - x) ** 2).sum(dim=(1, 2)))


def test_loud_weighting_counts_loud_misses_and_loud_spurious_energy():
    lw = 3.0
    x = torch.zeros(1, 1, 3)
    x_hat = torch.zeros(1, 1, 3)
    x[0, 0, 0] = 1.0  # a loud element predicted silent: weight 1 + 3 * 1
    x_hat[0, 0, 1] = 0.5  # a silent element predicted at 0.5: weight 1 + 3 * 0.5
    err = recon_error(x_hat, x, loud_weight=lw)
    assert float(err) == pytest.approx(1.0 * 4.0 + 0.25 * 2.5)


def test_kl_gradient_scales_linearly_with_beta():
    # Higgins et al. 2017: loss = recon + beta * KL; beta = 1 is the plain ELBO
    mu = torch.tensor([[0.3, -0.8]], requires_grad=True)
    logvar = torch.tensor([[0.1, -0.5]])
    x = torch.rand(1, 2, 2)
    grads = []
    for beta in (1.0, 2.0):
        loss, rec, _ = vae_loss(x, x, mu, logvar, kl_weight=beta)  # zero recon error
        (g,) = torch.autograd.grad(loss, mu)
        grads.append(g)
        assert float(rec) == 0.0
    torch.testing.assert_close(grads[1], 2 * grads[0])


# ------------------------------------------------------------------ shapes and range


@pytest.mark.parametrize("preset", ["tiny", "drums", "long"])
def test_decoder_output_has_the_exact_shape_and_lies_in_unit_range(preset):
    s = load_settings(preset)
    model = build_model(s.audio, s.model).eval()
    z = torch.randn(3, s.model.latent_dim) * torch.tensor([[0.0], [1.0], [50.0]])
    with torch.no_grad():
        out = model.decode(z)
        x_hat, mu, logvar, zz = model(torch.rand(2, s.audio.n_bins, s.audio.n_frames))
    assert out.shape == (3, s.audio.n_bins, s.audio.n_frames)
    assert float(out.min()) >= 0.0 and float(out.max()) <= 1.0
    assert x_hat.shape == (2, s.audio.n_bins, s.audio.n_frames)
    assert mu.shape == logvar.shape == zz.shape == (2, s.model.latent_dim)
    assert torch.equal(zz, mu)  # eval mode decodes the posterior mean


@pytest.mark.parametrize("n_frames", [1, 2, 5, 8, 63, 87])
@pytest.mark.parametrize("depth", [1, 3])
def test_any_frame_count_round_trips_to_the_same_shape(n_frames, depth):
    model = ShotVAE(n_bins=9, n_frames=n_frames, latent_dim=2, width=8, depth=depth,
                    kernel_size=5)
    x_hat, *_ = model(torch.rand(2, 9, n_frames))
    assert x_hat.shape == (2, 9, n_frames)
    assert frame_levels(n_frames, depth)[0] == n_frames


def test_training_mode_samples_and_eval_mode_uses_the_mean():
    model = small_model()
    x = torch.rand(2, 33, 21)
    torch.manual_seed(7)
    _, mu, _, z = model.train()(x)
    assert not torch.equal(z, mu)
    _, mu, _, z = model(x, sample=False)
    assert torch.equal(z, mu)


def test_template_starts_the_decoder_near_the_mean_spectrogram():
    model = small_model()
    mean = torch.rand(33, 21) * 0.8 + 0.1
    init_template(model, mean)
    with torch.no_grad():
        model.dec_out.weight.zero_()
        model.dec_out.bias.zero_()
        out = model.decode(torch.randn(2, 4))
    torch.testing.assert_close(out, mean.expand(2, 33, 21), atol=1e-5, rtol=0)
