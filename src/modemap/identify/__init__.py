"""Stage 8, identification: the whole pipeline as estimators."""

from modemap.identify.identifier import HybridIdentifier, labels_frame
from modemap.identify.options import OPTION_DEFAULTS, options_record, stage_parameters

__all__ = [
    "OPTION_DEFAULTS",
    "HybridIdentifier",
    "labels_frame",
    "options_record",
    "stage_parameters",
]
