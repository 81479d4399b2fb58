"""Scan lines: the record, the contract-v1 file, the readers of every layout, quarantine.

:func:`read_line_file` validates a file into a :class:`ScanLine` or raises
:class:`~strayline.errors.LineFileError` naming the file, the field, what was expected and
what was found; :func:`quarantine_file` moves such a file aside with a sidecar. Readers
(:mod:`strayline.lines.readers`) turn each layout's files into the same records: one
contract-v1 file per line, a growing scan file, plain arrays with a sidecar, or a plug-in's
own; :func:`check_line` is the contract's check for any of them.
"""

from strayline.lines._h5check import NAME_PATTERN, NAME_RULE
from strayline.lines.growing_file import (
    GROWING_FILE_READER,
    GrowingFileReader,
    GrowingFileWriter,
    ScanHeader,
)
from strayline.lines.line_check import check_line
from strayline.lines.line_file_reader import LINE_FILE_READER, LineFileReader, check_line_file
from strayline.lines.plain_arrays import (
    PLAIN_ARRAYS_READER,
    PlainArraysReader,
    parse_sidecar,
    plain_line_name,
    read_plain_line,
    write_plain_line,
)
from strayline.lines.quarantine import (
    BAD_FILE_RULE,
    HELD_SCAN_RULE,
    NOTE_SUFFIX,
    QUARANTINE_DIR,
    QuarantineRecord,
    bad_file_event,
    held_scan_cleared,
    held_scan_event,
    quarantine_file,
)
from strayline.lines.readers import (
    READER_GROUP,
    HandedOver,
    InstalledReaders,
    LineReader,
    ReaderChoice,
    built_in_readers,
    installed_readers,
    nothing_handed_over,
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
    "GROWING_FILE_READER",
    "HELD_SCAN_RULE",
    "LINE_FILE_READER",
    "MIN_FREQ",
    "NAME_PATTERN",
    "NAME_RULE",
    "NOTE_SUFFIX",
    "PLAIN_ARRAYS_READER",
    "QUARANTINE_DIR",
    "READER_GROUP",
    "Direction",
    "GrowingFileReader",
    "GrowingFileWriter",
    "HandedOver",
    "InstalledReaders",
    "LineFileReader",
    "LineLimits",
    "LineReader",
    "PlainArraysReader",
    "QuarantineRecord",
    "ReaderChoice",
    "ScanHeader",
    "ScanLine",
    "bad_file_event",
    "built_in_readers",
    "check_line",
    "check_line_file",
    "held_scan_cleared",
    "held_scan_event",
    "installed_readers",
    "is_temporary_name",
    "line_file_bytes",
    "line_file_name",
    "line_key_from_name",
    "nothing_handed_over",
    "parse_line_bytes",
    "parse_sidecar",
    "plain_line_name",
    "quarantine_file",
    "read_line_file",
    "read_plain_line",
    "write_line_file",
    "write_plain_line",
]
