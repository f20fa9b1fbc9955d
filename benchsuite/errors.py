"""The one exception type for mistakes in what a user gave us.

Anything raised as :class:`UserError` is reported by the command line as a
single line on stderr (``benchsuite: error: <message>``) with exit code 2 and
no traceback. Validate input once, at the boundary, and raise this with a
message that names the file, field or value and what is wrong with it.
"""

from __future__ import annotations


class UserError(Exception):
    """A mistake in the user's input (file, field, value); exit code 2."""

    exit_code = 2


def where(path: object, field: str | None = None) -> str:
    """Format a location prefix such as ``problems/lsq.toml: [lsq-a].params.n``."""
    return f"{path}: {field}" if field else f"{path}"
