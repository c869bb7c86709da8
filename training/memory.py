"""The position-free term's memory: known-good patch features, subsampled by greedy coreset selection.

PatchCore (Roth et al., CVPR 2022): every position of the frozen pretrained feature map, averaged over a small
neighbourhood, is one patch feature; an image patch is as anomalous as its distance to the nearest known-good
patch, wherever in the known-good images that patch was. Random textures and mixed layouts, which put a different
thing at every position, stay normal; a crack matches no known-good patch anywhere.

Greedy coreset selection (the k-center greedy approximation; Sener & Savarese 2018, as PatchCore uses it) keeps
the patches that cover the feature space, so a memory of a few thousand entries stands in for a million.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

NEIGHBOURHOOD = 3  # feature cells averaged around each position (PatchCore's local aggregation, p = 3)
CANDIDATES_PER_ENTRY = 16  # the coreset is chosen from at most this many random patches per memory entry
PROJECTION = 32  # coreset distances in a random projection to this many dimensions (Johnson-Lindenstrauss)


def local_average(phi: torch.Tensor) -> torch.Tensor:
    """(B, C, h, w) -> (B, C, h, w): each position's features averaged over its 3 x 3 neighbourhood."""
    return F.avg_pool2d(phi, NEIGHBOURHOOD, stride=1, padding=NEIGHBOURHOOD // 2, count_include_pad=False)


def memory_features(phi: torch.Tensor, pool: int = 1) -> torch.Tensor:
    """(B, C, h, w) -> (B, C, h // pool, w // pool): the locally averaged features, then averaged over pool x pool
    cells (`ModelConfig.memory_pool`): a coarser patch, a quarter of the positions at pool 2."""
    phi = local_average(phi)
    return F.avg_pool2d(phi, pool) if pool > 1 else phi


def as_patches(phi: torch.Tensor) -> torch.Tensor:
    """(B, C, h, w) -> (B * h * w, C) patch features."""
    return phi.permute(0, 2, 3, 1).reshape(-1, phi.shape[1])


def patch_features(phi: torch.Tensor, batch: int = 32, pool: int = 1) -> torch.Tensor:
    """(N, C, h, w) pretrained features -> (N * h' * w', C) patch features (`memory_features`), written `batch`
    images at a time into one tensor: no full-size temporaries (with 2000 training images, each is hundreds of MB)."""
    n, c = phi.shape[:2]
    h, w = phi.shape[2] // pool, phi.shape[3] // pool
    out = torch.empty(n * h * w, c, dtype=phi.dtype, device=phi.device)
    for i in range(0, n, batch):
        chunk = phi[i : i + batch]
        out[i * h * w : (i + len(chunk)) * h * w] = as_patches(memory_features(chunk, pool))
    return out


def greedy_coreset(patches: torch.Tensor, m: int, *, seed: int = 0) -> torch.Tensor:
    """(N, C) -> the indices (m,) of a greedy k-center coreset: each next entry is the patch farthest from every
    entry chosen so far. Distances are taken in a random projection (cheaper; they are preserved up to a small
    factor). Deterministic for a given seed."""
    n = len(patches)
    if m >= n:
        return torch.arange(n)
    gen = torch.Generator().manual_seed(seed)
    y = patches
    if patches.shape[1] > PROJECTION:
        proj = torch.randn(patches.shape[1], PROJECTION, generator=gen) / PROJECTION**0.5
        y = patches @ proj  # (N, P)
    sq = (y * y).sum(1)
    first = int(torch.randint(n, (1,), generator=gen))
    chosen = [first]
    dist = (sq - 2 * (y @ y[first]) + sq[first]).clamp_(min=0)  # squared distance to the nearest chosen entry
    for _ in range(m - 1):
        j = int(dist.argmax())
        chosen.append(j)
        torch.minimum(dist, (sq - 2 * (y @ y[j]) + sq[j]).clamp_(min=0), out=dist)
    return torch.tensor(chosen)


def build_memory(patches: torch.Tensor, m: int, *, seed: int = 0) -> torch.Tensor:
    """(N, C) known-good patch features -> (min(m, N), C) memory: a coreset of a random candidate subset."""
    gen = torch.Generator().manual_seed(seed)
    n_cand = min(len(patches), CANDIDATES_PER_ENTRY * m)
    candidates = patches[torch.randperm(len(patches), generator=gen)[:n_cand]]
    return candidates[greedy_coreset(candidates, m, seed=seed)].contiguous()


def nearest_distance(
    phi: torch.Tensor, memory: torch.Tensor, memory_sq: torch.Tensor, centre: torch.Tensor
) -> torch.Tensor:
    """(B, C, h, w) locally averaged features -> (B, 1, h, w) Euclidean distance to the nearest memory entry.

    One matrix multiply and a minimum (both export to ONNX): |q - m|² = |q|² + min over m of (|m|² - 2 q·m), the
    bracket in a single multiply of q with a column of ones appended by the table [-2 m, |m|²]; the (B, hw, M)
    product is written once and read once by the minimum (with the sums outside the multiply it was passed over
    three more times: 2-4 x slower at 4096 entries, measured). `memory` is stored minus `centre` (its mean), and q
    is moved the same way: the distance is the same, the float32 cancellation of the expansion much smaller."""
    b, c, h, w = phi.shape
    q = phi.permute(0, 2, 3, 1).reshape(b, h * w, c) - centre  # (B, hw, C)
    table = torch.cat([-2 * memory, memory_sq[:, None]], 1)  # (M, C + 1); a constant of the exported graph
    bracket = torch.cat([q, torch.ones_like(q[..., :1])], -1) @ table.t()  # (B, hw, M): |m|² - 2 q·m
    d2 = bracket.amin(-1) + (q * q).sum(-1)  # (B, hw)
    return d2.clamp(min=0).sqrt().reshape(b, 1, h, w)
