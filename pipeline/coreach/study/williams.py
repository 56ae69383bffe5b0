"""Williams designs: condition orders in which each condition follows each other one equally often."""

from __future__ import annotations


def williams_rows(n: int) -> list[list[int]]:
    """The sequences (rows) of a Williams design for `n` conditions, conditions numbered 0..n-1.

    Williams (1949): first row 0, 1, n-1, 2, n-2, ...; row i adds i to every entry (mod n). For even n this
    one Latin square is balanced for first-order carry-over (each ordered pair adjacent once); for odd n it is
    not, and the square together with its mirror image (each row reversed) is: 2n rows, each pair twice.
    """
    if n < 1:
        raise ValueError("a Williams design needs at least one condition")
    first, low, high = [0], 1, n - 1
    while len(first) < n:  # alternate from the bottom and the top: 0, 1, n-1, 2, n-2, ...
        first.append(low)
        low += 1
        if len(first) < n:
            first.append(high)
            high -= 1
    square = [[(c + i) % n for c in first] for i in range(n)]
    if n % 2 == 1 and n > 1:
        square += [list(reversed(row)) for row in square]
    return square


def carry_over_counts(rows: list[list[int]], n: int) -> dict[tuple[int, int], int]:
    """How often each ordered pair (a, b), a != b, appears with b immediately after a."""
    counts = {(a, b): 0 for a in range(n) for b in range(n) if a != b}
    for row in rows:
        for a, b in zip(row, row[1:]):
            counts[(a, b)] += 1
    return counts
