"""The learned transform: a small convolutional autoencoder with GDN and a per-channel
Laplace entropy model (torch, CPU). Imported only by the conv codec and by training.

Encoder: three 5x5 stride-2 convolutions with GDN between them (Ballé, Laparra &
Simoncelli, "Density modeling of images using a generalized normalization
transformation", ICLR 2016), added to a linear 8x8 stride-8 path; decoder: the mirror with
transposed convolutions and inverse GDN, added to a linear transposed path. The linear
paths start as the KLT of the training patches and the GDN paths start at zero, so an
untrained model is a block KLT and training on a CPU for minutes only has to learn what the
KLT misses (a small network trained from random weights for that long stays far below it). Latent channels are ordered by importance with nested dropout (Rippel,
Gelbart & Adams, ICML 2014): training keeps a random leading subset, so keeping the first c
channels of one model degrades gracefully. Rate is modelled as in Ballé, Laparra &
Simoncelli, "End-to-end optimized image compression", ICLR 2017: additive uniform noise
in training, rounding at test, here with a learned Laplace scale per channel.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

STRIDE = 8  # three stride-2 layers, and the 8x8 linear path
LATENT_PER_UNIT = 255.0 / 8.0  # a latent unit is worth 8 grey levels of KLT coefficient
LN2 = math.log(2.0)


@dataclass(frozen=True)
class Arch:
    hidden: int = 64
    latent: int = 96
    side: int = 0  # side-latent channels of the hyperprior; 0: per-channel factorized model only
    side_hidden: int = 0

    def to_dict(self) -> dict:
        d = {"hidden": self.hidden, "latent": self.latent}
        if self.side:
            d.update(side=self.side, side_hidden=self.side_hidden)
        return d


class GDN(nn.Module):
    """y_i = x_i / sqrt(beta_i + sum_j gamma_ij x_j^2) (inverse: multiply)."""

    def __init__(self, ch: int, inverse: bool = False):
        super().__init__()
        self.inverse = inverse
        self.beta = nn.Parameter(torch.ones(ch))
        self.gamma = nn.Parameter(0.1 * torch.eye(ch))

    def forward(self, x):
        beta = self.beta.abs() + 1e-3  # a floor keeps the normalisation away from zero
        gamma = self.gamma.abs()
        norm = F.conv2d(torch.square(x), gamma[:, :, None, None], beta)
        if torch.is_grad_enabled():  # training: autograd needs every intermediate
            norm = torch.sqrt(norm)
            return x * norm if self.inverse else x / norm
        # Inference: the same operations in place, the same values bit for bit, and a
        # third faster at 512 x 512 x 64 (fewer full-size temporaries to allocate and fill).
        norm.sqrt_()
        return torch.mul(x, norm, out=norm) if self.inverse else torch.div(x, norm, out=norm)


class Hyper(nn.Module):
    """The hyperprior's float networks (:mod:`workbench.codecs.hyperprior` evaluates the
    synthesis in integers): analysis y -> z at a quarter of the latent grid; synthesis z ->
    (mean in latent units, log2 scale) of every latent, by two 3x3 convolutions each followed
    by a 2x pixel shuffle, then a 1x1 convolution.

    The analysis sees each latent's magnitude over its channel's factorized scale, as the
    scale hyperprior does with ``|y|`` (Ballé et al. 2018), plus the signed first SIGNED
    channels, whose means are worth predicting. Measured against the raw latents, with the
    autoencoder frozen: 800 steps bring the rate to 0.78 of the factorized model's instead of
    0.92, which is the difference between losing to the adaptive context coder and beating it.
    """

    SIGNED = 4

    def __init__(self, latent: int, hidden: int, side: int):
        super().__init__()
        self.latent = latent
        self.signed = min(self.SIGNED, latent)
        self.h_a = nn.Sequential(nn.Conv2d(latent + self.signed, hidden, 3, padding=1), nn.ReLU(),
                                 nn.Conv2d(hidden, hidden, 5, stride=2, padding=2), nn.ReLU(),
                                 nn.Conv2d(hidden, side, 5, stride=2, padding=2))
        self.s1 = nn.Conv2d(side, 4 * hidden, 3, padding=1)
        self.s2 = nn.Conv2d(hidden, 4 * hidden, 3, padding=1)
        self.s3 = nn.Conv2d(hidden, 2 * latent, 1)
        self.z_log_scale = nn.Parameter(torch.zeros(side))  # factorized Laplace of the side latents

    def analyse(self, y, log_scale):
        u = y * torch.exp2(-log_scale.detach())[None, :, None, None]
        return self.h_a(torch.cat([u.abs(), u[:, :self.signed]], dim=1))

    def synthesise(self, z):
        h = F.pixel_shuffle(F.relu(self.s1(z)), 2)
        h = F.pixel_shuffle(F.relu(self.s2(h)), 2)
        out = self.s3(h)
        return out[:, :self.latent], out[:, self.latent:]


def _deep(path, x, bf16: bool):
    if not bf16:
        return path(x)
    with torch.autocast("cpu", dtype=torch.bfloat16):
        return path(x).float()


def bf16_fast() -> bool:
    """Whether this CPU multiplies bfloat16 in hardware (AVX512-BF16 or AMX), where oneDNN
    runs the GDN paths about 2.5x faster than in float32 (and elsewhere some 40x slower).
    ``WORKBENCH_BF16=0`` turns it off; ``WORKBENCH_BF16=1`` turns it on everywhere, so that
    a CPU without the hardware decodes a bfloat16 bundle exactly as it was made, slowly.

    Measured with the shipped model (2026-12-04, a 2-core CPU with AMX, 4 MP): synthesis
    0.66 -> 0.31 s, analysis 0.50 -> 0.27 s; with the linear paths in bfloat16 too it was
    0.26 s but 0.49 grey levels RMS away from float32, and 0.15 with them in float32. BD-rate
    of the GDN paths in bfloat16 against float32 on the four held-out photographs: +0.08,
    +0.08, +0.04, +0.03 % (rate at equal PSNR)."""
    import os

    forced = os.environ.get("WORKBENCH_BF16", "").strip()
    if forced in ("0", "1"):
        return forced == "1"
    probes = [getattr(torch.cpu, n, None) for n in ("_is_avx512_bf16_supported", "_is_amx_tile_supported")]
    try:
        return any(p() for p in probes if p is not None)
    except Exception:  # a private probe that changed: float32 is always right
        return False


def _conv(i, o):
    return nn.Conv2d(i, o, 5, stride=2, padding=2)


def _deconv(i, o):
    return nn.ConvTranspose2d(i, o, 5, stride=2, padding=2, output_padding=1)


class Autoencoder(nn.Module):
    def __init__(self, arch: Arch = Arch()):
        super().__init__()
        n, c = arch.hidden, arch.latent
        self.arch = arch
        self.analysis = nn.Conv2d(3, c, STRIDE, stride=STRIDE)
        self.encoder_deep = nn.Sequential(_conv(3, n), GDN(n), _conv(n, n), GDN(n), _conv(n, c))
        self.synthesis = nn.ConvTranspose2d(c, 3, STRIDE, stride=STRIDE)
        self.decoder_deep = nn.Sequential(_deconv(c, n), GDN(n, True), _deconv(n, n), GDN(n, True), _deconv(n, 3))
        for last in (self.encoder_deep[-1], self.decoder_deep[-1]):
            nn.init.zeros_(last.weight)
            nn.init.zeros_(last.bias)
        self.log_scale = nn.Parameter(torch.zeros(c))  # log2 of each channel's Laplace scale
        if arch.side:
            self.hyper = Hyper(c, arch.side_hidden, arch.side)

    # The linear paths hold unit-norm basis vectors and apply the fixed scale here, so that
    # Adam's steps (which ignore a parameter's scale) move them by a fraction of their size.
    # With ``bf16`` the GDN paths run in bfloat16 (see :func:`bf16_fast`); the linear paths,
    # which carry most of the signal, stay in float32.
    def encoder(self, x, bf16: bool = False):
        return self.analysis(x) * LATENT_PER_UNIT + _deep(self.encoder_deep, x, bf16)

    def decoder(self, y, bf16: bool = False):
        return self.synthesis(y / LATENT_PER_UNIT) + _deep(self.decoder_deep, y, bf16)

    def linear_parameters(self):
        return list(self.analysis.parameters()) + list(self.synthesis.parameters())

    @torch.no_grad()
    def init_from_klt(self, patches: np.ndarray) -> None:
        """Set the linear paths to the KLT of ``patches`` (N, 3, 8, 8) in [0, 1].

        Latent k = (KLT coefficient k in 8-bit levels) / 8, so a latent step of 1 is a
        coefficient step of 8 grey levels, as in the block KLT codec.
        """
        c = self.arch.latent
        x = patches.reshape(len(patches), -1).astype(np.float64) * 255.0
        mean = x.mean(axis=0)
        cov = np.cov((x - mean).T, bias=True)
        vals, vecs = np.linalg.eigh(cov)
        order = np.argsort(vals)[::-1][:c]
        basis = vecs[:, order]  # (192, c)
        w = torch.from_numpy(basis.T.reshape(c, 3, STRIDE, STRIDE).astype(np.float32))
        self.analysis.weight.copy_(w)
        self.analysis.bias.copy_(torch.from_numpy((-(basis.T @ mean) / 255.0).astype(np.float32)))
        self.synthesis.weight.copy_(w)
        chan_mean = mean.reshape(3, STRIDE * STRIDE).mean(axis=1) / 255.0
        self.synthesis.bias.copy_(torch.from_numpy(chan_mean.astype(np.float32)))
        # Laplace scale b = std / sqrt(2) for each latent channel.
        std = np.sqrt(np.maximum(vals[order], 1e-6)) / 8.0
        self.log_scale.copy_(torch.from_numpy(np.log2(std / np.sqrt(2.0)).astype(np.float32)))

    @torch.no_grad()
    def init_hyper_from_factorized(self) -> None:
        """Make a fresh hyperprior predict, everywhere, the per-channel factorized model's
        scales (mean 0): it starts no worse than that model, so its early rate gradients do
        not push the encoder around while it learns."""
        self.hyper.s3.weight.zero_()
        self.hyper.s3.bias.zero_()
        self.hyper.s3.bias[self.arch.latent:] = self.log_scale

    def likelihood_bits(self, y_tilde: torch.Tensor, s: torch.Tensor, keep: torch.Tensor) -> torch.Tensor:
        """Bits of each image's noisy latents (quantiser units) under Laplace(0, b_c / s);
        masked channels are free. Returns one value per batch item."""
        b = (2.0 ** self.log_scale)[None, :, None, None] / s
        upper = _laplace_cdf(y_tilde + 0.5, b)
        lower = _laplace_cdf(y_tilde - 0.5, b)
        p = torch.clamp(upper - lower, min=1e-9)
        return (-torch.log2(p) * keep).sum(dim=(1, 2, 3))

    def hyper_bits(self, y: torch.Tensor, y_tilde: torch.Tensor, s: torch.Tensor, keep: torch.Tensor,
                   z_noise: torch.Tensor | None) -> torch.Tensor:
        """Bits of each image's noisy latents under the hyperprior (Laplace of the predicted
        mean and scale, in quantiser units) plus the bits of its side latents (``z_noise``
        uniform noise in training, None to round)."""
        z = self.hyper.analyse(_pad_grid(y, 4), self.log_scale)
        z_tilde = z + z_noise[..., :z.shape[2], :z.shape[3]] if z_noise is not None else torch.round(z)
        mean, log_scale = self.hyper.synthesise(z_tilde)
        mean, log_scale = mean[..., :y.shape[2], :y.shape[3]], log_scale[..., :y.shape[2], :y.shape[3]]
        b = torch.exp2(log_scale.clamp(-12.0, 16.0)) / s
        m = mean / s
        p = torch.clamp(_laplace_cdf(y_tilde - m + 0.5, b) - _laplace_cdf(y_tilde - m - 0.5, b), min=1e-9)
        bits_y = (-torch.log2(p) * keep).sum(dim=(1, 2, 3))
        bz = (2.0 ** self.hyper.z_log_scale)[None, :, None, None]
        pz = torch.clamp(_laplace_cdf(z_tilde + 0.5, bz) - _laplace_cdf(z_tilde - 0.5, bz), min=1e-9)
        return bits_y + (-torch.log2(pz)).sum(dim=(1, 2, 3))


def _pad_grid(y: torch.Tensor, mult: int) -> torch.Tensor:
    """``y`` edge-padded so its grid is a multiple of ``mult`` (the side latents' grid)."""
    ph, pw = (-y.shape[2]) % mult, (-y.shape[3]) % mult
    return F.pad(y, (0, pw, 0, ph), mode="replicate") if ph or pw else y


def _laplace_cdf(x, b):
    return 0.5 + 0.5 * torch.sign(x) * (1 - torch.exp(-x.abs() / b))


def train_step(model: Autoencoder, x: torch.Tensor, lam: float, gen: torch.Generator,
               steps: tuple[float, float] = (2 ** -2.5, 2 ** 1.5), bf16: bool = False):
    """Loss = bits per pixel + (lam / s^2) * 255^2 * MSE per image, with a latent step s drawn
    log-uniformly from ``steps`` and nested dropout. Scaling lambda with 1/s^2 keeps each
    step at its own rate–distortion balance (distortion grows as the step squared), so one
    model serves every step. With ``bf16`` the GDN paths run in bfloat16, as the codec runs
    them where the CPU has it; the rate terms stay in float32."""
    nb, _, h, w = x.shape
    c = model.arch.latent
    y = model.encoder(x, bf16)
    lo, hi = np.log2(steps[0]), np.log2(steps[1])
    s = torch.exp2(torch.rand(nb, 1, 1, 1, generator=gen) * float(hi - lo) + float(lo))
    noise = torch.rand(y.shape, generator=gen) - 0.5
    y_tilde = y / s + noise
    keep_n = torch.where(torch.rand(nb, generator=gen) < 0.5, torch.full((nb,), c),
                         torch.randint(1, c + 1, (nb,), generator=gen))
    keep = (torch.arange(c)[None, :] < keep_n[:, None]).float()[:, :, None, None]
    x_hat = model.decoder(y_tilde * s * keep, bf16)
    if model.arch.side:
        zn = torch.rand((nb, model.arch.side, -(-h // (STRIDE * 4)), -(-w // (STRIDE * 4))), generator=gen) - 0.5
        bpp = model.hyper_bits(y, y_tilde, s, keep, zn) / (h * w)
    else:
        bpp = model.likelihood_bits(y_tilde, s, keep) / (h * w)
    mse = ((x_hat - x) ** 2).mean(dim=(1, 2, 3))
    loss = (bpp + lam / s.reshape(-1) ** 2 * 255.0**2 * mse).mean()
    return loss, bpp.mean().detach(), mse.mean().detach()


# ------------------------------------------------------------------ tiled inference

# Work done on the margins at 4 MP: 256 px tiles 2.25x, 512 1.41x, 1024 1.13x. 512 was
# measured 1.3x faster than 256, and 1024 1.23-1.30x faster than 512 (2048 slower again);
# memory stays bounded by the tile (about 0.4 GB of activations at 1024).
TILE = 1024
MARGIN = 64  # beyond the receptive field's significant part: seams do not show


def _pad_to(x: np.ndarray, mult: int) -> np.ndarray:
    h, w = x.shape[-2:]
    ph, pw = (-h) % mult, (-w) % mult
    return np.pad(x, ((0, 0), (0, ph), (0, pw)), mode="edge")


def _tiled(fn, x: np.ndarray, out_channels: int, tile: int, margin: int, up: int, down: int) -> np.ndarray:
    """Apply a fully convolutional ``fn`` to (C, H, W) ``x`` in overlapping tiles.

    Output coordinates are input coordinates times ``up / down``; each tile is run with
    ``margin`` extra samples around it and only its core is kept, so no seam shows.
    """
    _, h, w = x.shape

    def m(v):
        return v * up // down

    out = np.zeros((out_channels, m(h), m(w)), np.float32)
    for y0 in range(0, h, tile):
        for x0 in range(0, w, tile):
            y1, x1 = min(h, y0 + tile), min(w, x0 + tile)
            a0, b0 = max(0, y0 - margin), max(0, x0 - margin)
            a1, b1 = min(h, y1 + margin), min(w, x1 + margin)
            z = fn(torch.from_numpy(np.ascontiguousarray(x[:, a0:a1, b0:b1]))[None])[0].numpy()
            oy, ox = m(y0 - a0), m(x0 - b0)
            out[:, m(y0):m(y1), m(x0):m(x1)] = z[:, oy:oy + m(y1 - y0), ox:ox + m(x1 - x0)]
    return out


def _channels_last(fn):
    """``fn`` run on channels-last tensors: oneDNN's convolutions are faster in that layout
    (4 MP with the shipped model: encode 1.32 -> 0.99 s, decode 1.90 -> 1.33 s on 2 cores);
    use with a model converted by :func:`for_inference`."""
    return lambda t: fn(t.contiguous(memory_format=torch.channels_last)).contiguous()


def for_inference(model: Autoencoder) -> Autoencoder:
    """``model`` in eval mode with its convolution weights in the channels-last layout."""
    return model.eval().to(memory_format=torch.channels_last)


@torch.inference_mode()
def encode_array(model: Autoencoder, x: np.ndarray, bf16: bool = False) -> np.ndarray:
    """Latents (C, H/8, W/8) of a (3, H, W) float32 image in [0, 1], padded to 8, in tiles
    (the GDN path in bfloat16 with ``bf16``)."""
    fn = _channels_last(lambda t: model.encoder(t, bf16))
    return _tiled(fn, _pad_to(x, STRIDE), model.arch.latent, TILE, MARGIN, 1, STRIDE)


@torch.inference_mode()
def decode_array(model: Autoencoder, y: np.ndarray, shape: tuple[int, int], bf16: bool = False) -> np.ndarray:
    """(3, H, W) float32 reconstruction of latents, in tiles, cropped to ``shape`` (the GDN
    path in bfloat16 with ``bf16``)."""
    fn = _channels_last(lambda t: model.decoder(t, bf16))
    out = _tiled(fn, y, 3, TILE // STRIDE, MARGIN // STRIDE, STRIDE, 1)
    return out[:, : shape[0], : shape[1]]


@torch.inference_mode()
def side_latents(model: Autoencoder, y: np.ndarray, bf16: bool = False) -> np.ndarray:
    """Integer side latents (S, ceil(h/4), ceil(w/4)) of latents ``y`` (C, h, w): the
    hyper-analysis, rounded. Runs in float (bfloat16 with ``bf16``) on the encoder only;
    the decoder receives them."""
    t = _pad_grid(torch.from_numpy(np.ascontiguousarray(y))[None], 4)
    z = _deep(lambda v: model.hyper.analyse(v, model.log_scale), t.contiguous(memory_format=torch.channels_last), bf16)
    return torch.round(z.contiguous())[0].numpy().astype(np.int64)
