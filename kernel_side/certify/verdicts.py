"""From pairwise logit-difference bounds to verdicts: per member, for the predictive, per posterior share.

Everything here works on ``L[s, n, c, j]``, a lower bound of ``z_c - z_j`` for member ``s`` at
every input of point ``n``'s perturbation set (:func:`jostle.certify.linear_bounds.pair_lower_bounds`),
computed in chunks of members and points so that the bound rows stay within the ensemble's
memory budget.
"""
from __future__ import annotations

import numpy as np
import scipy.stats
import torch
import torch.nn.functional as F
from torch import Tensor

from jostle.certify.intervals import PerturbationSet
from jostle.certify.linear_bounds import pair_lower_bounds
from jostle.certify.network import read_chain

__all__ = ["pair_bounds", "member_margins", "predictive_probability_bounds", "clopper_pearson_lower"]

# Points may sit this far outside the bounds (float rounding of stored bounds), as in the attacks.
# Temporaries alive per bound row and input feature during a back-substitution (lam, its two signs, a product).
_TEMPORARIES = 4
# Chunks small enough for the working set to stay near a core's cache: the bound passes are
# memory-bound elementwise work. Measured on 2 cores with a 100-member 2-64-64-2 net
# (benchmarks/bench_certify.py): IBP ~2x and CROWN ~4x faster than in memory-budget-sized
# chunks; 16 MiB beat 2 and 4 MiB for the tanh map layer (1.6 s against 2.4 and 2.0 s).
_CACHE_BYTES = 16 * 2**20


def pair_bounds(ens, x: Tensor, eps: Tensor, norm: str, method: str, box: tuple[Tensor, Tensor] | None) -> Tensor:
    """``L`` [S, N, C, C] for ``eps`` of shape (S or 1, N), chunked over members and points."""
    members, points = len(ens), x.shape[0]
    member_chunk, point_chunk = _chunk_sizes(ens, x, method)
    rows = []
    for m0 in range(0, members, member_chunk):
        m1 = min(members, m0 + member_chunk)
        params = {name: value[m0:m1] for name, value in ens.params.items()}
        chain = read_chain(ens.template, params, tuple(x.shape[1:]))
        eps_members = eps if eps.shape[0] == 1 else eps[m0:m1]
        blocks = []
        for n0 in range(0, points, point_chunk):
            n1 = min(points, n0 + point_chunk)
            region = PerturbationSet.around(x[n0:n1], eps_members[:, n0:n1], norm, box)
            blocks.append(pair_lower_bounds(chain, region, method).expand(m1 - m0, -1, -1, -1))
        rows.append(torch.cat(blocks, dim=1))
    return torch.cat(rows, dim=0)


def member_margins(pairs: Tensor, labels: Tensor) -> Tensor:
    """Lower bound [S, N] of ``z_y - max_{j != y} z_j`` for each member's label ``labels`` [S, N]."""
    classes = pairs.shape[-1]
    own = pairs.gather(2, labels[:, :, None, None].expand(-1, -1, 1, classes)).squeeze(2)  # [S, N, C]
    own = own.masked_fill(F.one_hot(labels, classes).bool(), float("inf"))
    return own.amin(-1)


def predictive_probability_bounds(pairs: Tensor) -> tuple[Tensor, Tensor]:
    """Bounds [N, C] of the mean member probability of each class over the set.

    ``p_c = 1 / (1 + sum_{j != c} exp(z_j - z_c))``, so ``z_j - z_c <= -L[c, j]`` gives
    ``p_c >= 1 / (1 + sum_j exp(-L[c, j]))`` and ``z_j - z_c >= L[j, c]`` gives
    ``p_c <= 1 / (1 + sum_j exp(L[j, c]))``; averaging member bounds bounds the mean.
    """
    classes = pairs.shape[-1]
    diagonal = torch.eye(classes, dtype=torch.bool, device=pairs.device)
    below = torch.logsumexp((-pairs).masked_fill(diagonal, float("-inf")), dim=-1)  # over j for row c
    above = torch.logsumexp(pairs.masked_fill(diagonal, float("-inf")), dim=-2)  # over j for column c
    return torch.exp(-F.softplus(below)).mean(0), torch.exp(-F.softplus(above)).mean(0)


def clopper_pearson_lower(certified: np.ndarray, members: int, confidence: float) -> np.ndarray:
    """One-sided Clopper-Pearson lower confidence bound on a proportion, for ``certified`` of ``members``.

    The bound is the ``1 - confidence`` quantile of Beta(k, S - k + 1) (0 where k = 0), which is
    the lower end of the two-sided exact interval at level ``2 * confidence - 1``
    (Clopper & Pearson 1934).
    """
    k = np.asarray(certified, dtype=np.float64)
    low = scipy.stats.beta.ppf(1.0 - confidence, np.maximum(k, 1.0), members - k + 1.0)
    return np.where(k > 0, low, 0.0)


def _chunk_sizes(ens, x: Tensor, method: str) -> tuple[int, int]:
    """Members and points per chunk so that the bound rows of one chunk fit ``ens.memory_budget``."""
    chain = read_chain(ens.template, {name: value[:1] for name, value in ens.params.items()}, tuple(x.shape[1:]))
    sizes = [int(np.prod(step.in_shape)) for step in chain.steps] + [int(np.prod(chain.steps[-1].out_shape))]
    classes = sizes[-1]
    if method == "ibp":
        per_pair = max(sizes) * 2
    else:
        widest = [max(sizes[: i + 1]) for i in range(len(sizes))]
        per_pair = max(2 * size * wide for size, wide in zip(sizes[1:], widest)) + classes * classes * max(sizes)
    per_pair *= _TEMPORARIES * x.element_size()
    pairs = max(1, min(ens.memory_budget // per_pair, max(len(ens), _CACHE_BYTES // per_pair)))
    members = len(ens)
    if pairs >= members:
        return members, max(1, min(x.shape[0], pairs // members))
    return int(pairs), 1
