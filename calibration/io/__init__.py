"""Every data file read or written: the only package that touches the file system for data.

``read_responses`` turns a CSV or Parquet table (one row per respondent, an id column, every
other column an item, empty cell = not administered) into one validated :class:`ResponseData`.
Every problem is reported with its row, column and value; up to ``MAX_PROBLEMS`` are listed at
once so a user can fix a file in one pass. Rooms: ``tables`` (reading text tables), ``responses``
(response tables), ``specs`` (item specs, policy overrides), ``write`` (atomic writes).
"""

from calibration.errors import InputError
from calibration.io.responses import (
    ItemSpec,
    ResponseData,
    ScoringBatch,
    ScoringInput,
    file_sha256,
    read_for_scoring,
    read_responses,
)
from calibration.io.specs import read_item_spec, read_policy_overrides
from calibration.io.tables import (
    MAX_PROBLEMS,
    Partition,
    TextTable,
    parse_codes,
    plan_partitions,
    read_header,
    row_label,
)
from calibration.io.write import current_umask, finite_or_none, write_csv_atomic

__all__ = [
    "MAX_PROBLEMS",
    "InputError",
    "ItemSpec",
    "Partition",
    "ResponseData",
    "ScoringBatch",
    "ScoringInput",
    "TextTable",
    "current_umask",
    "file_sha256",
    "finite_or_none",
    "parse_codes",
    "plan_partitions",
    "read_for_scoring",
    "read_header",
    "read_item_spec",
    "read_policy_overrides",
    "read_responses",
    "row_label",
    "write_csv_atomic",
]
