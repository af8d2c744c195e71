"""Training objective: reconstruction of both patches plus a weighted cosine-agreement term.

``loss = v * (rec(x1, r1) + rec(x2, r2)) / 2 + w(t) * mean(1 - cos(z1, z2))``

where ``rec`` is the mean squared (or absolute) error per element, ``v`` the reconstruction
weight (0 = agreement only) and ``w(t)`` follows a schedule. The cosine is taken on the raw
embeddings, on batch-centred ones (``z - mean over the 2N embeddings of the batch``), or after a
non-affine batch normalisation (centred, then each dimension divided by its batch standard
deviation).

Why the centred diagnostics: every embedding shares one large common component, so the raw
cosine of any two embeddings is close to 1 after a few steps and says little. Centring removes
that component; the co-located cosine should then rise above the random-pair cosine.
"""

from __future__ import annotations

import math

import numpy as np
import torch
import torch.nn.functional as F

BN_EPS = 1e-5  # variance floor of the batch normalisation (torch.nn.BatchNorm1d's default eps)


def agreement_weight(step: int, total_steps: int, weight: float, schedule: str, ramp_fraction: float) -> float:
    """Weight of the agreement term at ``step`` (0-based); ``T = ramp_fraction * total_steps``.

    ``constant``: ``weight`` from the first step. ``ramp``: linear from 0 at step 0 to ``weight``
    at ``T``, then constant. ``cosine_ramp``: ``weight * (1 - cos(pi * t / T)) / 2`` up to ``T``,
    then constant. ``step``: 0 before ``T``, ``weight`` from ``T`` on (common practice, no source).
    """
    ramp_steps = max(1.0, ramp_fraction * total_steps)
    frac = min(1.0, step / ramp_steps)
    if schedule == "constant":
        return float(weight)
    if schedule == "ramp":
        return float(weight) * frac
    if schedule == "cosine_ramp":
        return float(weight) * 0.5 * (1.0 - math.cos(math.pi * frac))
    if schedule == "step":
        return float(weight) if step >= ramp_fraction * total_steps else 0.0
    raise AssertionError(f"unknown schedule {schedule!r}")  # validated in config


def agreement_space(centred: bool, batch_norm: bool) -> str:
    """The config's two switches as one name: ``"raw"``, ``"centred"`` or ``"batchnorm"``."""
    return "batchnorm" if batch_norm else ("centred" if centred else "raw")


def centre(z1: torch.Tensor, z2: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Subtract the mean of all 2N embeddings of the batch from both halves. ``(N, D) -> (N, D)``."""
    mean = torch.cat([z1, z2]).mean(dim=0, keepdim=True)
    return z1 - mean, z2 - mean


def batch_normalise(z1: torch.Tensor, z2: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Non-affine batch normalisation over the 2N embeddings: centre, divide each dimension by
    ``sqrt(biased variance + eps)`` (as ``torch.nn.BatchNorm1d(affine=False)`` in training mode)."""
    both = torch.cat([z1, z2])
    mean = both.mean(dim=0, keepdim=True)
    std = torch.sqrt(both.var(dim=0, unbiased=False, keepdim=True) + BN_EPS)
    return (z1 - mean) / std, (z2 - mean) / std


def agreement(z1: torch.Tensor, z2: torch.Tensor, centred: bool | str = False) -> torch.Tensor:
    """``mean(1 - cos(z1_i, z2_i))`` over the batch; ``z1, z2: (N, D)``. Range [0, 2].

    ``centred``: False / ``"raw"``, True / ``"centred"``, or ``"batchnorm"``.
    """
    space = {False: "raw", True: "centred"}.get(centred, centred)
    if space == "centred":
        z1, z2 = centre(z1, z2)
    elif space == "batchnorm":
        z1, z2 = batch_normalise(z1, z2)
    else:
        assert space == "raw", space
    return (1.0 - F.cosine_similarity(z1, z2, dim=1, eps=1e-8)).mean()


def reconstruction(x: torch.Tensor, recon: torch.Tensor, kind: str = "mse") -> torch.Tensor:
    """Mean per-element error between a patch batch and its reconstruction."""
    if kind == "mse":
        return F.mse_loss(recon, x)
    if kind == "l1":
        return F.l1_loss(recon, x)
    raise AssertionError(f"unknown reconstruction loss {kind!r}")  # validated in config


def pair_loss(
    x1: torch.Tensor, x2: torch.Tensor, r1: torch.Tensor, r2: torch.Tensor,
    z1: torch.Tensor, z2: torch.Tensor, weight: float, centred: bool | str = False, kind: str = "mse",
    rec_weight: float = 1.0,
) -> dict[str, torch.Tensor]:
    """Loss terms for a batch of co-located pairs.

    ``x1, x2, r1, r2: (N, C, p, p)``; ``z1, z2: (N, D)``. Returns ``total``
    (``rec_weight * reconstruction + weight * agreement``), ``reconstruction`` and
    ``agreement`` (the unweighted ``mean(1 - cos)``; ``centred`` as in :func:`agreement`).
    """
    rec = 0.5 * (reconstruction(x1, r1, kind) + reconstruction(x2, r2, kind))
    agr = agreement(z1, z2, centred)
    return {"total": rec_weight * rec + weight * agr, "reconstruction": rec, "agreement": agr}


def mmd_to_prior(z: torch.Tensor, prior: torch.Tensor) -> torch.Tensor:
    """Unbiased squared MMD between embeddings ``z: (N, D)`` and prior draws ``prior: (N, D)``.

    Inverse multiquadratic kernel ``k(x, y) = C / (C + |x - y|^2)`` with ``C = 2 D`` (a unit
    Gaussian prior), as in the latent regulariser of Wasserstein autoencoders (Tolstikhin et al.,
    ICLR 2018, Algorithm 2): mean of ``k`` over distinct pairs within ``z`` and within ``prior``,
    minus twice the mean of ``k`` over all cross pairs.
    """
    n, d = z.shape
    c = 2.0 * d

    def k(a, b):
        return c / (c + torch.cdist(a, b).pow(2))

    off = 1.0 - torch.eye(n, dtype=z.dtype)
    within = ((k(z, z) * off).sum() + (k(prior, prior) * off).sum()) / (n * (n - 1))
    return within - 2.0 * k(z, prior).mean()


def prior_draw(n: int, d: int, seed: list[int]) -> torch.Tensor:
    """``(n, d)`` standard Gaussian draws from a torch generator seeded by ``seed`` (a numpy seed list)."""
    g = torch.Generator().manual_seed(int(np.random.default_rng(seed).integers(2 ** 62)))
    return torch.randn(n, d, generator=g)


def retrieval_score(query: np.ndarray, candidates: np.ndarray, true_index: int) -> float:
    """Co-location retrieval: the fraction of queries whose nearest candidate (Euclidean) is the
    true one. ``query: (K, D)``, ``candidates: (K, R, D)``; chance level is ``1 / R``.
    Ties count as misses only when another candidate is strictly nearer.
    """
    d = ((candidates - query[:, None, :]) ** 2).sum(-1)  # (K, R)
    return float(np.mean(d[:, true_index] <= d.min(axis=1)))


@torch.no_grad()
def cosine_diagnostics(z1: torch.Tensor, z2: torch.Tensor) -> dict[str, float]:
    """Cosines that tell whether agreement is learnt, and spread that tells whether it collapsed.

    - ``cos_raw``: mean raw cosine of co-located pairs;
    - ``cos_colocated`` / ``cos_random``: mean cosine of batch-centred co-located pairs and of
      centred random pairs (``z1_i`` with ``z2_{i-1}``);
    - ``spread``: mean over dimensions of the standard deviation of the embeddings;
    - ``direction_spread``: ``1 -`` the mean raw cosine of random pairs (0 = every embedding
      points the same way, the collapse the raw agreement term alone drives to);
    - ``effective_rank``: ``exp(entropy)`` of the normalised singular values of the centred
      embeddings (1 = collapsed onto a line; D = all dimensions used).
    """
    z1, z2 = z1.float(), z2.float()
    c1, c2 = centre(z1, z2)
    allc = torch.cat([c1, c2])
    s = torch.linalg.svdvals(allc)
    p = s / s.sum().clamp_min(1e-12)
    entropy = -(p * torch.log(p.clamp_min(1e-12))).sum()
    return {
        "cos_raw": F.cosine_similarity(z1, z2, dim=1).mean().item(),
        "cos_colocated": F.cosine_similarity(c1, c2, dim=1).mean().item(),
        "cos_random": F.cosine_similarity(c1, torch.roll(c2, 1, dims=0), dim=1).mean().item(),
        "spread": torch.cat([z1, z2]).std(dim=0).mean().item(),
        "direction_spread": 1.0 - F.cosine_similarity(z1, torch.roll(z2, 1, dims=0), dim=1).mean().item(),
        "effective_rank": torch.exp(entropy).item(),
    }
