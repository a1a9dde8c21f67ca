"""Plain-text tables for the commands' human-readable output."""

from __future__ import annotations

from collections.abc import Sequence


def print_columns(
    headers: Sequence[str], rows: Sequence[Sequence[object]], *, pad_last: bool = True
) -> None:
    """Left-aligned columns two spaces apart, a dashed rule under the headers, trailing spaces
    trimmed.  With ``pad_last`` False the last column's rule is only as wide as its header
    (for a free-text column that should not widen the table)."""
    cells = [[str(v) for v in row] for row in rows]
    widths = [max(len(h), *(len(row[i]) for row in cells)) for i, h in enumerate(headers)]
    if not pad_last:
        widths[-1] = len(headers[-1])
    print("  ".join(h.ljust(w) for h, w in zip(headers, widths, strict=True)).rstrip())
    print("  ".join("-" * w for w in widths))
    for row in cells:
        print("  ".join(v.ljust(w) for v, w in zip(row, widths, strict=True)).rstrip())
