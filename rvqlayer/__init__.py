"""rvqlayer: a multi-stage (residual) vector quantizer for neural codec bottlenecks.

Core imports need only torch, numpy and einops; the Lightning callback lives
in :mod:`rvqlayer.callbacks` and is imported on demand.

Where torch is not installed, ``import rvqlayer`` still works and offers
``RvqlayerError`` and the numpy-only modules :mod:`rvqlayer.runtime` (encode
and decode an exported quantizer) and :mod:`rvqlayer.stream` (bitstreams);
the torch layer and its helpers are imported only when torch is present.
"""

from ._errors import RvqlayerError

try:
    from .bitrate import bitrate, bits_per_vector
    from .codebook import Codebook
    from .export import load_codebooks, save_codebooks
    from .health import HealthReport, StageHealth
    from .kmeans import KMeansResult, fit_kmeans
    from .quantizer import MultiStageQuantizer, QuantizerOutput
    from .search import beam_encode, greedy_encode, nearest_code
except ModuleNotFoundError as exc:  # torch absent: the numpy-only modules still import
    if exc.name != "torch":
        raise

__all__ = [
    "Codebook",
    "HealthReport",
    "KMeansResult",
    "MultiStageQuantizer",
    "QuantizerOutput",
    "RvqlayerError",
    "StageHealth",
    "beam_encode",
    "bitrate",
    "bits_per_vector",
    "fit_kmeans",
    "greedy_encode",
    "load_codebooks",
    "nearest_code",
    "save_codebooks",
]

__version__ = "0.1.0"
