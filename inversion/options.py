"""Declared option values, checked by one function with one message template."""

from __future__ import annotations

from collections.abc import Collection

from .exceptions import InputError

__all__ = ["check_option"]


def check_option(what: str, value: object, allowed: Collection[str], *, file: str | None = None,
                 field: str | None = None) -> str:
    """Return ``value`` if it is one of ``allowed``; otherwise raise :class:`InputError`.

    Examples
    --------
    >>> check_option("volatility form", "kinked", ["kinked", "power"])
    'kinked'
    """
    if not isinstance(value, str) or value not in allowed:
        raise InputError(f"unknown {what}; choose one of {sorted(allowed)}", file=file,
                         field=field or what, value=value)
    return value
