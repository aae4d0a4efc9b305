"""The engine's binary row format and state schemas (no I/O).

* ``schema``: Spark DataType JSON into a frozen type model, Arrow types, state schema files.
* ``unsafe_row``: vectorised decoding of UnsafeRow bytes into Arrow columns
  (``decode_rows``), and ``encode_rows`` (from ``writer``) for tests and benchmarks.
* ``partitioning``: which shuffle partition the engine assigns a key to.
"""

from migrate.rows.schema import (
    StateSchema,
    arrow_type,
    parse_state_schema_file,
    spark_type_from_json,
)
from migrate.rows.unsafe_row import decode_rows, decode_rows_report, encode_rows

__all__ = ["StateSchema", "arrow_type", "parse_state_schema_file", "spark_type_from_json",
           "decode_rows", "decode_rows_report", "encode_rows"]
