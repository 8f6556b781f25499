"""Validation and quoting of SQL identifiers taken from job files.

Every schema, table and column name that reaches SQL text passes
:func:`check_identifier` (when the job file is read) and :func:`quote`
(when the SQL is built), so a name can never carry SQL of its own.
"""

from __future__ import annotations

import re

from ..errors import SettingsError

IDENTIFIER_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,62}$")


def is_identifier(name: object) -> bool:
    """True when ``name`` is a plain identifier (letters, digits, underscore)."""
    return isinstance(name, str) and IDENTIFIER_RE.fullmatch(name) is not None


def check_identifier(name: object, key: str) -> str:
    """Return ``name`` or raise SettingsError naming ``key``."""
    if not is_identifier(name):
        raise SettingsError(
            f"{key} = {name!r} is not a plain identifier; use letters, digits and "
            "underscores only, starting with a letter or underscore (at most 63 characters)"
        )
    return str(name)


def check_qualified(name: object, key: str) -> tuple[str, ...]:
    """Split ``table`` or ``schema.table`` into validated parts."""
    if not isinstance(name, str) or not 1 <= len(name.split(".")) <= 2:
        raise SettingsError(f"{key} = {name!r} is not allowed; use table or schema.table")
    parts = name.split(".")
    if not all(is_identifier(p) for p in parts):
        raise SettingsError(
            f"{key} = {name!r} is not allowed; use table or schema.table made of letters, "
            "digits and underscores (for anything else write a [source] query)"
        )
    return tuple(parts)


def quote(name: str) -> str:
    """Double-quote a validated identifier (re-checked: defence in depth)."""
    if not is_identifier(name):
        raise ValueError(f"refusing to quote unvalidated identifier {name!r}")
    return f'"{name}"'


def quote_qualified(parts: tuple[str, ...] | list[str]) -> str:
    """Quote ``("schema", "table")`` as ``"schema"."table"``."""
    return ".".join(quote(p) for p in parts)


def key_fragments(keys: tuple[str, ...] | list[str]) -> dict[str, str]:
    """The key-column pieces of the DDL and view templates of every dialect, from the quoted ``keys``.

    ``key_list`` lists the keys, ``<alias>_key_list`` with a table alias; the
    ``*_key_join`` entries are the join conditions the views use.
    """

    def listed(alias: str) -> str:
        return ", ".join(f"{alias}.{k}" for k in keys)

    def joined(a: str, b: str) -> str:
        return " AND ".join(f"{a}.{k} = {b}.{k}" for k in keys)

    return {
        "key_list": ", ".join(keys),
        "p_key_list": listed("p"), "s_key_list": listed("s"), "f_key_list": listed("f"), "v_key_list": listed("v"),
        "key_join": joined("p", "l"), "f_key_join": joined("f", "v"), "xv_key_join": joined("x", "v"),
        "ks_key_join": joined("k", "s"),
    }
