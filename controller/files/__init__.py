"""Reading users' files: TOML into validated models, with every problem located.

Everything here raises :class:`controller.errors.SquallError` (``FILE:LINE: field.path:
message``) for problems in the input, never a bare parser or validation exception.
"""

from controller.files._load import (
    FileProblems,
    format_path,
    load_model,
    load_text,
    load_toml,
    locate,
    parse_toml,
    read_text,
    validate_data,
)
from controller.files._locate import TomlIndex, TomlPath, context_at_line, index_toml
from controller.files._typewalk import allowed_keys, model_keys

__all__ = [
    "FileProblems",
    "TomlIndex",
    "TomlPath",
    "allowed_keys",
    "context_at_line",
    "format_path",
    "index_toml",
    "load_model",
    "load_text",
    "load_toml",
    "locate",
    "model_keys",
    "parse_toml",
    "read_text",
    "validate_data",
]
