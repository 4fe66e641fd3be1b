"""Counts in messages: ``counted(1, "track")`` is "1 track", ``counted(9, "window")`` is "9 windows"."""


def counted(n, noun: str, plural: str | None = None) -> str:
    """``n`` and ``noun``, the noun in the plural (default: with an s) unless ``n`` is exactly one."""
    return f"{n} {noun if n == 1 else (plural or noun + 's')}"
