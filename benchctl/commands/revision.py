"""``benchctl revision PART REVISION``: the revision's one-page summary (HTML + PNGs)."""

from __future__ import annotations

import argparse

from rich.markup import escape

from benchctl.exit_codes import EXIT_FAILED, EXIT_NOT_CHECKED, EXIT_OK
from benchctl.commands.console import console
from benchctl.commands.stores import open_existing_store

#: Exit code by the summary's overall verdict: a page was written either way.
_EXIT = {"passed": EXIT_OK, "no_limits": EXIT_OK, "failed": EXIT_FAILED, "incomplete": EXIT_NOT_CHECKED}


def cmd_revision(args: argparse.Namespace) -> int:
    from benchctl.report.revision import build_revision_summary

    with open_existing_store(args.db) as store:
        files = build_revision_summary(store, args.part, args.revision, limits=args.limits or (),
                                       against=args.against, out_dir=args.out)
    colour = {"passed": "green", "failed": "red"}.get(files.overall, "yellow")
    console().print(f"revision summary of {escape(args.part)} rev {escape(args.revision)}: "
                    f"[bold {colour}]{escape(files.overall.replace('_', ' '))}[/]")
    console().print(f"page: [bold]{escape(str(files.html_path))}[/] ({len(files.png_paths)} plots)")
    return _EXIT[files.overall]


__all__ = ["cmd_revision"]
