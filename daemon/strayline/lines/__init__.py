"""The scan-line file contract (version 1): the record, its reader and writer, quarantine.

:func:`read_line_file` validates a file into a :class:`ScanLine` or raises
:class:`~strayline.errors.LineFileError` naming the file, the field, what was expected and
what was found; :func:`quarantine_file` moves such a file aside with a sidecar.
"""

from strayline.lines._h5check import NAME_PATTERN, NAME_RULE
from strayline.lines.quarantine import (
    BAD_FILE_RULE,
    QUARANTINE_DIR,
    QuarantineRecord,
    bad_file_event,
    quarantine_file,
)
from strayline.lines.scan_line import (
    DIRECTIONS,
    FORMAT_NAME,
    FORMAT_VERSION,
    MIN_FREQ,
    Direction,
    LineLimits,
    ScanLine,
    is_temporary_name,
    line_file_bytes,
    line_file_name,
    line_key_from_name,
    parse_line_bytes,
    read_line_file,
    write_line_file,
)

__all__ = [
    "BAD_FILE_RULE",
    "DIRECTIONS",
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "MIN_FREQ",
    "NAME_PATTERN",
    "NAME_RULE",
    "QUARANTINE_DIR",
    "Direction",
    "LineLimits",
    "QuarantineRecord",
    "ScanLine",
    "bad_file_event",
    "is_temporary_name",
    "line_file_bytes",
    "line_file_name",
    "line_key_from_name",
    "parse_line_bytes",
    "quarantine_file",
    "read_line_file",
    "write_line_file",
]
