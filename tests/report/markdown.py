"""Reading the card's Markdown back in tests (a plain helper module, not a test module)."""

from __future__ import annotations


def md_table(lines: list[str], header: str) -> list[list[str]]:
    """The body cells of the Markdown table whose header line starts with ``header``."""
    start = next(i for i, line in enumerate(lines) if line.startswith(header))
    rows = []
    for line in lines[start + 2 :]:  # past the header and its |---| line
        if not line.startswith("|"):
            break
        rows.append([cell.strip() for cell in line.strip("|").split("|")])
    return rows
