"""One section of docs/performance.md rewritten by a benchmark, the rest of the file kept."""

from __future__ import annotations

from pathlib import Path

PERF = Path(__file__).resolve().parents[1] / "docs" / "performance.md"


def replace_section(heading: str, lines: list[str], path: Path = PERF) -> None:
    """Put ``lines`` (starting with the ``## heading`` line) in place of the section of
    ``path`` with that heading, up to the next ``## `` heading; append it when there is
    none."""
    text = path.read_text(encoding="utf-8") if path.exists() else "# Performance\n"
    marker = f"\n{heading}\n"
    body = "\n".join(lines).strip("\n") + "\n"
    if marker in text:
        start = text.index(marker)
        end = text.find("\n## ", start + len(marker))
        tail = "" if end < 0 else text[end:]
        text = text[:start].rstrip("\n") + "\n\n" + body + tail
    else:
        text = text.rstrip("\n") + "\n\n" + body
    path.write_text(text, encoding="utf-8")
