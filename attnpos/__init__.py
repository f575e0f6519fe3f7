"""attnpos: find out how a trained transformer uses token position."""

__version__ = "0.1.0"

from .errors import AttnposError  # noqa: E402

__all__ = ["AttnposError", "__version__"]
