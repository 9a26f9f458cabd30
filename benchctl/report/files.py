"""Writing a self-contained page and its PNG files into a folder (run reports, comparisons, summaries)."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from benchctl.errors import StoreError

from .html import EmbeddedImage


def write_page(target: Path, page_name: str, page: str, images: Sequence[EmbeddedImage], *, what: str,
               hint: str = "choose a directory you may write with --out") -> tuple[Path, tuple[Path, ...]]:
    """Write ``images`` as PNG files and ``page`` as ``page_name`` into ``target`` (created);
    returns (page path, PNG paths). A folder that cannot be written is a StoreError naming ``what``."""
    try:
        target.mkdir(parents=True, exist_ok=True)
        png_paths = []
        for img in images:
            path = target / img.file_name
            path.write_bytes(img.png)
            png_paths.append(path)
        html_path = target / page_name
        html_path.write_text(page, encoding="utf-8")
    except OSError as exc:
        raise StoreError(f"cannot write {what} to {target}: {exc.strerror or exc}; {hint}") from exc
    return html_path, tuple(png_paths)
