"""The error hierarchy of warmstart.

Every error a user can act on derives from :class:`WarmstartError` *and* from the matching
built-in exception, so ``except ValueError`` in user code keeps working. Messages name the file,
the bad value and what was expected.
"""
from __future__ import annotations

__all__ = [
    "WarmstartError",
    "VolumeReadError",
    "SourceNotFoundError",
    "UnsupportedFormatError",
    "IntensityError",
    "RecipeError",
    "CorpusError",
    "PretrainError",
    "ExportError",
    "WeightsMismatchError",
    "DataMismatchWarning",
]

# Old name -> new name, importable (with a FutureWarning) for one release; see the README's changelog.
_RENAMED = {"WarmStartError": "WeightsMismatchError"}


class WarmstartError(Exception):
    """Base class of every error warmstart raises on purpose."""


class VolumeReadError(WarmstartError, ValueError):
    """A file exists but cannot be read as a grayscale volume (corrupt, truncated, RGB, ...)."""


class SourceNotFoundError(WarmstartError, FileNotFoundError):
    """A path named as a source does not exist."""


class UnsupportedFormatError(VolumeReadError):
    """The path is not in any format warmstart reads."""


class IntensityError(WarmstartError, ValueError):
    """An intensity reference cannot be fitted or applied (constant data, no finite voxel, ...)."""


class RecipeError(WarmstartError, ValueError):
    """A recipe file or override has an unknown key, a wrong type or a bad value."""


class CorpusError(WarmstartError, ValueError):
    """A corpus store is missing, inconsistent, or cannot be built or merged as asked."""


class PretrainError(WarmstartError, RuntimeError):
    """Pretraining cannot go on (non-finite loss, missing checkpoint to resume, ...)."""


class ExportError(WarmstartError, ValueError):
    """An encoder file cannot be written, or one that is read is damaged, tampered with or of an
    unknown version."""


class WeightsMismatchError(WarmstartError, ValueError):
    """An encoder file's weights do not fit the network they are asked to warm-start."""


class DataMismatchWarning(UserWarning):
    """New data, once prepared, does not look like the corpus the encoder was trained on."""


def __getattr__(name: str) -> type:
    if name in _RENAMED:
        import warnings

        warnings.warn(f"warmstart.errors.{name} is now {_RENAMED[name]}; the old name works until the next release",
                      FutureWarning, stacklevel=2)
        return globals()[_RENAMED[name]]
    raise AttributeError(f"module 'warmstart.errors' has no attribute {name!r}")
