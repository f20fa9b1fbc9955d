"""Loading user code by import path ``package.module:attribute``.

Used for user-defined problem families and update rules. The current working
directory is put on ``sys.path`` first, so a user's own module next to their
project is found without installing it.
"""

from __future__ import annotations

import importlib
import os
import sys
from typing import Any

from benchsuite.errors import UserError


def is_import_path(text: str) -> bool:
    """True for ``module:attr`` / ``pkg.mod:Attr.inner`` (not a bare name)."""
    mod, sep, attr = text.partition(":")
    return bool(sep and mod and attr)


def load_object(path: str, *, what: str = "object") -> Any:
    """Import ``module:attr`` (attr may be dotted) and return the attribute."""
    if not is_import_path(path):
        raise UserError(f"{what} {path!r} is not an import path of the form package.module:attribute")
    mod_name, _, attr = path.partition(":")
    cwd = os.getcwd()
    if cwd not in sys.path:
        sys.path.insert(0, cwd)
    try:
        obj: Any = importlib.import_module(mod_name)
    except ImportError as exc:
        raise UserError(f"{what} {path!r}: cannot import module {mod_name!r} ({exc})") from None
    except Exception as exc:  # the user's module raised while importing
        raise UserError(f"{what} {path!r}: importing {mod_name!r} raised {type(exc).__name__}: {exc}") from None
    for part in attr.split("."):
        try:
            obj = getattr(obj, part)
        except AttributeError:
            raise UserError(f"{what} {path!r}: module {mod_name!r} has no attribute {attr!r}") from None
    return obj
