"""Request bodies to aligned numpy arrays: pure Python, numpy, pyarrow and orjson.

No Flask and no database: the service calls these functions with bytes or orjson-parsed
values and gets arrays in the holdout's row order, or one ``IngestError`` that says what
to fix (HTTP status, field, count, up to ten examples from the submitter's own input).
"""

from .align import align_ids, require_unique_ids
from .arrays import float_matrix, id_array, label_matrix, probability_tensor, target_vector
from .errors import IngestError
from .limits import DEFAULT_LIMITS, Limits

__all__ = [
    "DEFAULT_LIMITS",
    "IngestError",
    "Limits",
    "align_ids",
    "float_matrix",
    "id_array",
    "label_matrix",
    "probability_tensor",
    "require_unique_ids",
    "target_vector",
]
