"""Request bodies to aligned numpy arrays: pure Python, numpy, pyarrow and orjson.

No Flask and no database: the service calls these functions with bytes or orjson-parsed
values and gets arrays in the holdout's row order, or one ``IngestError`` that says what
to fix (HTTP status, field, count, up to ten examples from the submitter's own input).
"""

from .align import align_ids, require_unique_ids
from .arrays import float_matrix, id_array, label_matrix, probability_tensor, target_vector
from .body import decode_body
from .errors import IngestError
from .limits import DEFAULT_LIMITS, Limits
from .streaming import StreamedCsv, open_csv_stream
from .tables import (
    CSV_MEDIA_TYPE,
    PARQUET_MEDIA_TYPE,
    SubmissionArrays,
    holdout_from_table,
    read_table,
    submission_from_table,
)

__all__ = [
    "CSV_MEDIA_TYPE",
    "DEFAULT_LIMITS",
    "PARQUET_MEDIA_TYPE",
    "IngestError",
    "Limits",
    "StreamedCsv",
    "SubmissionArrays",
    "align_ids",
    "decode_body",
    "float_matrix",
    "holdout_from_table",
    "id_array",
    "label_matrix",
    "open_csv_stream",
    "probability_tensor",
    "read_table",
    "require_unique_ids",
    "submission_from_table",
    "target_vector",
]
