"""Per-voxel k-nearest-neighbour distance to the controls."""

from __future__ import annotations

from numbers import Integral

import numpy as np

from ..errors import ConfigError, InputError
from .base import VoxelScorer, check_controls, voxel_blocks

_TEMP_BYTES = 64 << 20  # cap on the (M, S, block, D) difference temporary


class VoxelKNN(VoxelScorer):
    """Mean Euclidean distance from a case's embedding to its ``k`` nearest controls, per voxel.

    Parameters
    ----------
    k : int, 1 <= k < S (the number of controls fitted on).

    ``score(y)[v] = (1/k) * sum of the k smallest |y[v] - controls[s, v]|`` over the controls s
    (as ``sklearn.neighbors.NearestNeighbors(n_neighbors=k).fit(controls[:, v]).kneighbors``
    distances, averaged). Distances are computed from differences, not from the expanded
    ``|x|^2 - 2 x.y + |y|^2`` form, so near-identical embeddings do not lose precision.

    Fitted attributes: ``controls_ (S, V, D)``, the controls array itself (kept by reference, not
    copied: do not modify it after ``fit``).
    """

    _param_names = ("k",)
    _state_names = ("controls_",)

    def __init__(self, k: int = 5):
        self.k = k

    def fit(self, controls) -> "VoxelKNN":
        """Keep ``controls: (S, V, D)`` float; returns self."""
        if isinstance(self.k, bool) or not isinstance(self.k, Integral) or self.k < 1:
            raise ConfigError(f"VoxelKNN: k must be an integer >= 1, got {self.k!r}; 5 is a usual choice")
        x = check_controls(controls, "VoxelKNN.fit")
        if self.k >= x.shape[0]:
            raise InputError(f"VoxelKNN.fit: k={self.k} needs more than k controls, got S={x.shape[0]}; "
                             f"lower k or add controls")
        self.controls_ = x
        self._set_sizes()
        return self

    def _set_sizes(self) -> None:
        S, V, D = self.controls_.shape
        self.n_controls_, self.n_voxels_, self.n_features_ = S, V, D

    def _score_many(self, cases: np.ndarray) -> np.ndarray:
        M, V, D = cases.shape
        S, k = self.n_controls_, int(self.k)
        out = np.empty((M, V))
        block = max(1, _TEMP_BYTES // (8 * M * S * D))
        for sl in voxel_blocks(V, block):
            diff = cases[:, None, sl].astype(np.float64) - self.controls_[None, :, sl]  # (M, S, B, D)
            dist = np.sqrt(np.einsum("msbd,msbd->msb", diff, diff))
            nearest = np.partition(dist, k - 1, axis=1)[:, :k]
            out[:, sl] = nearest.mean(1)
        return out
