"""The scorer protocol, input checks and the voxel-block pattern shared by every scorer.

Protocol (scikit-learn style): ``__init__`` stores parameters only; ``fit(controls)`` checks them,
fits and returns ``self``; fitted attributes end in ``_``; ``score(case)`` and
``score_many(cases)`` return per-voxel novelty, higher = more unusual.

Shapes: ``controls: (S, V, D)`` (S controls, V voxels, D embedding dimensions), ``case: (V, D)``,
``cases: (M, V, D)``; float32 or float64 numpy arrays (computations run in float64).

Voxel blocks: every scorer fits one independent model per voxel, so fitting on a block of voxels
``controls[:, a:b]`` gives, for those voxels, exactly the scores of a fit on all voxels. A caller
bounds memory by walking blocks::

    out = np.empty((M, V))
    for sl in voxel_blocks(V, 8192):
        scorer = make_scorer("ocsvm", nu=0.5).fit(controls[:, sl])
        out[:, sl] = scorer.score_many(cases[:, sl])

Peak memory is then a few copies of one block, whatever V is.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError


def voxel_blocks(n_voxels: int, block_size: int) -> list[slice]:
    """Consecutive slices of at most ``block_size`` voxels covering ``range(n_voxels)``."""
    if int(block_size) < 1:
        raise InputError(f"voxel_blocks: block_size must be >= 1, got {block_size}; pass a positive voxel count")
    return [slice(a, min(a + int(block_size), n_voxels)) for a in range(0, n_voxels, int(block_size))]


def all_finite(x: np.ndarray, chunk: int = 1 << 22) -> bool:
    """Whether every value of ``x`` is finite, in chunks (no full-size temporary)."""
    flat = x.reshape(-1) if x.flags.c_contiguous else None
    if flat is None:
        return all(bool(np.isfinite(x[i]).all()) for i in range(x.shape[0]))
    return all(bool(np.isfinite(flat[i:i + chunk]).all()) for i in range(0, flat.size, chunk))


def as_float_array(x, name: str, ndim: int, where: str, check_finite: bool = True) -> np.ndarray:
    """``x`` as a float32/float64 array of ``ndim`` dims with every value finite (no copy if possible)."""
    x = np.asarray(x)
    if x.ndim != ndim:
        want = {3: "(S, V, D) or (M, V, D)", 2: "(V, D)"}[ndim]
        raise InputError(f"{where}: {name} must be a {ndim}-D array {want}, got shape {x.shape}")
    if x.dtype not in (np.float32, np.float64):
        if not (np.issubdtype(x.dtype, np.integer) or np.issubdtype(x.dtype, np.floating)):
            raise InputError(f"{where}: {name} must hold real numbers, got dtype {x.dtype}")
        x = x.astype(np.float64)
    if check_finite and x.size and not all_finite(x):
        raise InputError(f"{where}: {name} has NaN or infinite values; mask or repair them before scoring")
    return x


def check_controls(controls, where: str, min_controls: int = 2, check_finite: bool = True) -> np.ndarray:
    """Validate ``controls: (S, V, D)`` with ``S >= min_controls``, ``V, D >= 1``."""
    x = as_float_array(controls, "controls", 3, where, check_finite)
    S, V, D = x.shape
    if S < min_controls:
        raise InputError(f"{where}: need at least {min_controls} controls to fit, got S={S}; add controls")
    if V < 1 or D < 1:
        raise InputError(f"{where}: controls must have at least one voxel and one dimension, got shape {x.shape}")
    return x


class VoxelScorer:
    """Base class: parameter handling, case checks, ``score`` via ``score_many``, state export.

    Subclasses set ``_param_names`` and implement ``fit`` and ``_score_many``.
    """

    _param_names: tuple[str, ...] = ()
    _state_names: tuple[str, ...] = ()

    def get_params(self) -> dict:
        """The constructor parameters, as given."""
        return {k: getattr(self, k) for k in self._param_names}

    def clone(self) -> "VoxelScorer":
        """A new unfitted scorer with the same parameters."""
        return type(self)(**self.get_params())

    def __repr__(self) -> str:
        return f"{type(self).__name__}({', '.join(f'{k}={v!r}' for k, v in self.get_params().items())})"

    def _check_fitted(self, where: str) -> None:
        if not hasattr(self, "n_voxels_"):
            raise InputError(f"{where}: {type(self).__name__} is not fitted; call fit(controls) first")

    def _check_cases(self, cases, where: str) -> np.ndarray:
        x = as_float_array(cases, "cases", 3, where)
        want = (self.n_voxels_, self.n_features_)
        if x.shape[1:] != want:
            raise InputError(f"{where}: cases of shape {x.shape} do not match the fitted (V, D) = {want}; "
                             "score the same voxels and embedding the scorer was fitted on")
        return x

    def score(self, case) -> np.ndarray:
        """``case: (V, D)`` -> novelty ``(V,) float64``, higher = more unusual."""
        name = f"{type(self).__name__}.score"
        self._check_fitted(name)
        x = as_float_array(case, "case", 2, name)
        return self.score_many(x[None])[0]

    def score_many(self, cases) -> np.ndarray:
        """``cases: (M, V, D)`` -> novelty ``(M, V) float64``, higher = more unusual."""
        name = f"{type(self).__name__}.score_many"
        self._check_fitted(name)
        return self._score_many(self._check_cases(cases, name))

    def _score_many(self, cases: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def fitted_state(self) -> dict[str, np.ndarray]:
        """The fitted arrays by attribute name (to save with ``get_params()``)."""
        self._check_fitted(f"{type(self).__name__}.fitted_state")
        return {k: np.asarray(getattr(self, k)) for k in self._state_names}

    @classmethod
    def from_state(cls, params: dict, state: dict) -> "VoxelScorer":
        """Rebuild a fitted scorer from ``get_params()`` and ``fitted_state()``."""
        missing = [k for k in cls._state_names if k not in state]
        if missing:
            raise InputError(f"{cls.__name__}.from_state: state lacks {missing}; save it with fitted_state()")
        obj = cls(**params)
        for k in cls._state_names:
            setattr(obj, k, np.ascontiguousarray(state[k]))
        obj._set_sizes()
        return obj

    def _set_sizes(self) -> None:  # pragma: no cover - abstract
        raise NotImplementedError
