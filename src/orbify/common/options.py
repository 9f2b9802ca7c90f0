"""Validating a string option against its allowed choices."""

from __future__ import annotations

from orbify.errors import OptionError


def check_choice(option: str, value: str, allowed: tuple[str, ...]) -> str:
    """Return ``value`` if it is one of ``allowed``, else raise OptionError listing them."""
    if value not in allowed:
        raise OptionError(f"Unknown {option} {value!r}", where=f"option {option}",
                          fix=f"choose one of: {', '.join(allowed)}")
    return value
