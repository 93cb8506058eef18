"""Text from input files made safe for a page: the one place that escapes it.

Basin ids and names, catalog titles, source labels and error messages all come from files
someone else may have written. Anything that reaches an HTML or Markdown pane (the explorer,
the HTML report) goes through `html_text` or `md_text`; file names built from ids go through
`safe_filename`; messages shown to visitors of a served page go through `public_message`.
"""

from __future__ import annotations

import html
import os
import re
from pathlib import Path

__all__ = ["html_text", "md_text", "safe_filename", "public_message", "study_relative"]

# CommonMark lets any ASCII punctuation be backslash-escaped; these are the ones that start
# emphasis, links, images, code, headings, lists, tables or line breaks. & < > become entities
# instead (a backslash before "&lt;" would break the entity).
_MD_SPECIAL = re.compile(r"([\\`*_{}\[\]()#+\-.!|~:\"'=$])")


def html_text(value) -> str:
    """`value` as text for an HTML element body or a quoted attribute (``& < > " '`` escaped)."""
    return html.escape(str(value), quote=True)


def md_text(value) -> str:
    """`value` as literal text inside Markdown (no markup, no raw HTML, no link, one line).

    Markdown panes pass raw HTML through, so ``< > &`` become entities; every other character that
    Markdown reads as syntax is backslash-escaped; line breaks become spaces (a line starting with
    ``#`` or ``-`` would otherwise open a heading or a list).
    """
    text = " ".join(str(value).split())
    text = _MD_SPECIAL.sub(r"\\\1", text)
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


_UNSAFE_NAME = re.compile(r"[^A-Za-z0-9_.-]+")


def safe_filename(*parts, max_len: int = 150) -> str:
    """A file name from ids and labels: only ``[A-Za-z0-9_.-]``, parts joined by ``_``.

    Runs of other characters (path separators, spaces, markup, non-ASCII) become one ``_``; a
    leading dot is dropped (no hidden files, no ``..``); the name is cut to `max_len` characters
    (file systems allow 255 bytes; the rest is left for a prefix and a suffix).
    """
    name = "_".join(_UNSAFE_NAME.sub("_", str(p)).strip("_") for p in parts if str(p) != "")
    name = re.sub(r"\.{2,}", ".", name).lstrip(".")[:max_len].rstrip(".")
    return name or "unnamed"


# an absolute POSIX path inside a message: starts at a slash that follows a blank, a quote, a
# bracket or the start, and runs to the next blank, quote or closing bracket
_ABS_PATH = re.compile(r"(?:(?<=^)|(?<=[\s'\"(\[=,:]))(/[^\s'\"()\[\],]*[^\s'\"()\[\],.:;])")
# messages that list what a file holds ("column 'q' not found (has: a, b, c)"): the list is text
# read from the file, which a visitor of the served page must not see
_FILE_CONTENT = re.compile(r"\s*\((?:has|found|columns|header|first line|got):[^)]*\)?", re.IGNORECASE)


def study_relative(path, root) -> str:
    """`path` relative to the study folder `root`; outside it, only ``<outside the study>/name``."""
    p = Path(os.path.normpath(str(path)))
    if root is not None:
        try:
            rel = p.relative_to(Path(os.path.normpath(str(root))))
            return rel.as_posix() or "."
        except ValueError:
            pass
    return f"<outside the study>/{p.name}"


def public_message(message, root=None, *, max_len: int = 400) -> str:
    """An error message fit for any visitor of a served page (plain text, still to be escaped).

    One line; absolute paths replaced by paths relative to the study folder `root` (or by the
    bare file name for paths outside it); lists of what a file holds (``(has: ...)``) removed,
    because they are the file's own text; cut to `max_len` characters.
    """
    text = " ".join(str(message).split())
    text = _FILE_CONTENT.sub(" (contents not shown)", text)
    if root is not None:
        # the study folder first, whole: a folder name with a space would stop the pattern below halfway
        for r in dict.fromkeys((str(root), os.path.realpath(str(root)))):
            r = " ".join(r.split()).rstrip("/")
            if r:
                text = text.replace(r + "/", "").replace(r, ".")
    text = _ABS_PATH.sub(lambda m: study_relative(m.group(1), root), text)
    return text if len(text) <= max_len else text[: max_len - 3] + "..."
