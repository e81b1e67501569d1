"""The frame-log text format v1: grammar as data, streaming reader, writer."""

from tracelab.format.grammar import (
    ERROR_FIELDS,
    ERROR_TYPES,
    HEADER_LINE,
    RECORD_FIELDS,
    form_letters,
    parse_form,
    payload_bytes,
)
from tracelab.format.writer import (
    BusDecl,
    LogHeader,
    LogWriter,
    error_line,
    frame_line,
    loss_line,
    mark_line,
    status_line,
)

__all__ = [
    "ERROR_FIELDS", "ERROR_TYPES", "HEADER_LINE", "RECORD_FIELDS", "BusDecl", "LogHeader",
    "LogWriter", "error_line", "form_letters", "frame_line", "loss_line", "mark_line",
    "parse_form", "payload_bytes", "status_line",
]
