"""Counts in messages: "1 sample", "2 samples" (never "1 samples" or "sample(s)")."""


def count(n: int, noun: str, plural: str | None = None) -> str:
    """``n`` and the noun in the right number: count(1, "hop") == "1 hop", count(3, "hop") == "3 hops"."""
    return f"{n} {noun if n == 1 else (plural or noun + 's')}"
