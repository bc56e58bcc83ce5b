"""``tinyprop docs``: the guides shipped inside the package (``docs/*.md``), listed or printed as text.

The pages are package data (``tinyprop/docs``), so an installed wheel has them
too; the same files are ``docs/`` in the source.
"""

from __future__ import annotations

import argparse
from importlib import resources

from ._common import USAGE, CommandError

HELP = "show the guides shipped with tinyprop: the list of pages, or one page (e.g. 'tinyprop docs cli')"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("page", nargs="?", metavar="PAGE",
                        help="the page to print, e.g. cli (the command line) or index (default: list the pages)")


def pages() -> dict[str, str]:
    """The shipped pages: ``{name: text}``, ``name`` being the file name without ``.md``."""
    folder = resources.files("tinyprop") / "docs"
    found = [entry for entry in folder.iterdir() if entry.name.endswith(".md")] if folder.is_dir() else []
    return {entry.name[:-3]: entry.read_text(encoding="utf-8") for entry in sorted(found, key=lambda e: e.name)}


def run(args: argparse.Namespace) -> int:
    shipped = pages()
    if not shipped:
        raise CommandError("this installation of tinyprop has no documentation pages (tinyprop/docs is missing)")
    if args.page is None:
        print("Guides shipped with tinyprop; 'tinyprop docs PAGE' prints one as text (Markdown):\n")
        width = max(map(len, shipped)) + 2
        for name, text in shipped.items():
            print(f"  {name:<{width}}{_title(text)}")
        return 0
    name = args.page.removesuffix(".md")
    if name not in shipped:
        raise CommandError(f"no page named {args.page!r}; the pages are {', '.join(shipped)}", USAGE)
    print(shipped[name], end="")
    return 0


def _title(text: str) -> str:
    """The first Markdown heading, without its ``#`` marks."""
    for line in text.splitlines():
        if line.startswith("#"):
            return line.lstrip("#").strip()
    return ""
