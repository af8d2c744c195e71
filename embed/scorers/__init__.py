"""Per-voxel novelty scorers: fit on the controls' embeddings, score a case; higher = more unusual.

One protocol (scikit-learn style, see :mod:`embed.scorers.base`)::

    scorer = VoxelOCSVM(nu=0.5, gamma="scale").fit(controls)   # controls: (S, V, D)
    novelty = scorer.score(case)                                # case: (V, D) -> (V,)
    novelties = scorer.score_many(cases)                        # cases: (M, V, D) -> (M, V)

Scorers: :class:`VoxelOCSVM` (one RBF one-class SVM per voxel, equal to scikit-learn's),
:class:`VoxelGaussian` (Ledoit-Wolf Gaussian, squared Mahalanobis distance), :class:`VoxelKNN`
(mean distance to the k nearest controls). Every model is per voxel, so a caller bounds memory by
fitting and scoring voxel blocks (:func:`voxel_blocks`). Standardised maps from leave-one-out
control scores: :mod:`embed.scorers.normalise`.
"""

from ..errors import ConfigError
from .base import VoxelScorer, voxel_blocks
from .gaussian import VoxelGaussian
from .knn import VoxelKNN
from .normalise import Standardiser, loo_scores
from .ocsvm import VoxelOCSVM

SCORERS = {"ocsvm": VoxelOCSVM, "gaussian": VoxelGaussian, "knn": VoxelKNN}


def make_scorer(name: str, **params) -> VoxelScorer:
    """An unfitted scorer by name (``"ocsvm"``, ``"gaussian"``, ``"knn"``) with its parameters."""
    if name not in SCORERS:
        raise ConfigError(f"unknown scorer {name!r}; choose one of {', '.join(sorted(SCORERS))}")
    try:
        return SCORERS[name](**params)
    except TypeError as e:
        raise ConfigError(f"scorer {name!r}: bad parameters {sorted(params)} ({e}); "
                          f"see help({SCORERS[name].__name__})") from None


__all__ = ["VoxelScorer", "VoxelOCSVM", "VoxelGaussian", "VoxelKNN", "Standardiser", "loo_scores",
           "voxel_blocks", "make_scorer", "SCORERS"]
