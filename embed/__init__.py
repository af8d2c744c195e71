"""twinpatch: site-specific patch encoders for per-voxel novelty scoring (research use only)."""

__version__ = "0.1.0"

from .errors import BundleError, CohortError, ConfigError, InputError, TwinpatchError  # noqa: E402,F401


def load_encoder(path):
    """Load a frozen encoder bundle (``.safetensors``); strict, unpickles nothing.

    Returns an :class:`embed.dense.Encoder`.
    """
    from .bundle import load_encoder as _load

    return _load(path)
