"""Size limits on what one request may carry (OWASP API4:2023, unrestricted resource use).

Exceeding a byte or row limit is HTTP 413 (the content is too large); exceeding the seed
or id-length limit is HTTP 422 (the content breaks a rule of the format). The defaults
let a 20-million-row holdout through while keeping one request's memory bounded.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Limits:
    """What one request may hold.

    - ``max_body_bytes``: body size, checked again after gzip decompression and against the
      uncompressed size a Parquet file declares.
    - ``max_seeds``: prediction sets (seeds) in one submission.
    - ``max_id_length``: characters (Unicode code points) in one id; also applies to class
      labels.
    - ``max_rows``: rows (ids) in one holdout or submission.
    """

    max_body_bytes: int = 512 * 1024 * 1024
    max_seeds: int = 64
    max_id_length: int = 256
    max_rows: int = 20_000_000

    def __post_init__(self) -> None:
        for name in ("max_body_bytes", "max_seeds", "max_id_length", "max_rows"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"Limits.{name} must be a positive integer, got {value!r}")


DEFAULT_LIMITS = Limits()
