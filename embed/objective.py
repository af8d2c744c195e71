"""Training objective: reconstruction of both patches plus a weighted cosine-agreement term.

``loss = (rec(x1, r1) + rec(x2, r2)) / 2 + w(t) * mean(1 - cos(z1, z2))``

where ``rec`` is the mean squared (or absolute) error per element and ``w(t)`` follows a
schedule. With ``centred=True`` the cosine is taken between batch-centred embeddings
(``z - mean over the 2N embeddings of the batch``).

Why the centred diagnostics: every embedding shares one large common component, so the raw
cosine of any two embeddings is close to 1 after a few steps and says little. Centring removes
that component; the co-located cosine should then rise above the random-pair cosine.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F


def agreement_weight(step: int, total_steps: int, weight: float, schedule: str, ramp_fraction: float) -> float:
    """Weight of the agreement term at ``step`` (0-based).

    ``constant``: ``weight`` from the first step. ``ramp``: linear from 0 at step 0 to
    ``weight`` at ``ramp_fraction * total_steps``, then constant (common practice, no source).
    """
    if schedule == "constant":
        return float(weight)
    if schedule == "ramp":
        ramp_steps = max(1.0, ramp_fraction * total_steps)
        return float(weight) * min(1.0, step / ramp_steps)
    raise AssertionError(f"unknown schedule {schedule!r}")  # validated in config


def centre(z1: torch.Tensor, z2: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Subtract the mean of all 2N embeddings of the batch from both halves. ``(N, D) -> (N, D)``."""
    mean = torch.cat([z1, z2]).mean(dim=0, keepdim=True)
    return z1 - mean, z2 - mean


def agreement(z1: torch.Tensor, z2: torch.Tensor, centred: bool = False) -> torch.Tensor:
    """``mean(1 - cos(z1_i, z2_i))`` over the batch; ``z1, z2: (N, D)``. Range [0, 2]."""
    if centred:
        z1, z2 = centre(z1, z2)
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
    z1: torch.Tensor, z2: torch.Tensor, weight: float, centred: bool = False, kind: str = "mse",
) -> dict[str, torch.Tensor]:
    """Loss terms for a batch of co-located pairs.

    ``x1, x2, r1, r2: (N, C, p, p)``; ``z1, z2: (N, D)``. Returns ``total``,
    ``reconstruction`` and ``agreement`` (the unweighted ``mean(1 - cos)``).
    """
    rec = 0.5 * (reconstruction(x1, r1, kind) + reconstruction(x2, r2, kind))
    agr = agreement(z1, z2, centred)
    return {"total": rec + weight * agr, "reconstruction": rec, "agreement": agr}


@torch.no_grad()
def cosine_diagnostics(z1: torch.Tensor, z2: torch.Tensor) -> dict[str, float]:
    """Cosines that tell whether agreement is learnt, and spread that tells whether it collapsed.

    - ``cos_raw``: mean raw cosine of co-located pairs;
    - ``cos_colocated`` / ``cos_random``: mean cosine of batch-centred co-located pairs and of
      centred random pairs (``z1_i`` with ``z2_{i-1}``);
    - ``spread``: mean over dimensions of the standard deviation of the embeddings;
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
        "effective_rank": torch.exp(entropy).item(),
    }
