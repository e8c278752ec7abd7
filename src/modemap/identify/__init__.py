"""Stage 8, identification: the whole pipeline as estimators."""

from modemap.identify.identifier import HybridIdentifier, labels_frame

__all__ = ["HybridIdentifier", "labels_frame"]
