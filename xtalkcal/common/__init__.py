"""Shared helpers at the bottom of the flow: safe file readers, field validation, small value
helpers and the package version.

May import: the standard library, numpy and :mod:`xtalkcal.exceptions`. Nothing here imports a
later stage of the flow.
"""

from xtalkcal.common.fields import (
    INVALID,
    NAME_RULE,
    RECHECK_INTERVAL_RANGE_H,
    REQUIRED,
    RIG_TIME_RANGE_S,
    FieldErrors,
    Fields,
    name_problem,
    read_header,
    short_repr,
    valid,
)
from xtalkcal.common.files import (
    MAX_FILE_BYTES,
    MAX_NESTING,
    atomic_write,
    load_json,
    load_toml,
    parse_json,
    read_text,
)
from xtalkcal.common.values import (
    json_float,
    readonly,
)
from xtalkcal.common.version import __version__

__all__ = [
    "atomic_write",
    "MAX_FILE_BYTES",
    "MAX_NESTING",
    "load_json",
    "load_toml",
    "parse_json",
    "read_text",
    "FieldErrors",
    "Fields",
    "INVALID",
    "NAME_RULE",
    "RECHECK_INTERVAL_RANGE_H",
    "REQUIRED",
    "RIG_TIME_RANGE_S",
    "name_problem",
    "read_header",
    "short_repr",
    "valid",
    "json_float",
    "readonly",
    "__version__",
]
