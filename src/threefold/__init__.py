"""threefold: context-aware recommendation from implicit feedback on the CPU."""

from threefold.feedback import CellEvidence, FeedbackWeighting, cell_weights
from threefold.tensor import SparseTensor
from threefold.vocabulary import UNKNOWN, Vocabulary

__version__ = "0.1.0"

__all__ = [
    "CellEvidence",
    "FeedbackWeighting",
    "SparseTensor",
    "UNKNOWN",
    "Vocabulary",
    "cell_weights",
    "__version__",
]
