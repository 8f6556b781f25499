"""One base error for everything a user can fix; the CLI prints it on one line."""

from __future__ import annotations

import unicodedata

#: a run of non-space characters longer than this is cut in messages (a 1 MB name stays short)
MAX_TOKEN = 120
#: the longest message line printed
MAX_LINE = 1_000
_UNSAFE = frozenset(("Cc", "Cf", "Cs", "Co", "Cn", "Zl", "Zp"))


def _cut(text: str, limit: int, keep_tail: int) -> str:
    if len(text) <= limit:
        return text
    cut = len(text) - limit
    return f"{text[:limit - keep_tail]}...[{cut:,} characters cut]...{text[len(text) - keep_tail:]}"


def _escape(text: str) -> str:
    if text.isascii() and text.isprintable():
        return text
    out = []
    for ch in text:
        if unicodedata.category(ch) in _UNSAFE:
            out.append(ch.encode("unicode_escape", "backslashreplace").decode("ascii"))
        else:
            out.append(ch)
    return "".join(out)


def clean_message(value: object, limit: int = MAX_LINE) -> str:
    """``value`` as one safe, short line for a terminal or a log.

    Whitespace (newlines included) collapses to single spaces; control and
    invisible formatting characters (an ANSI escape, a bidi override) are shown
    escaped (``\\x1b``) so they never reach a terminal raw; a run of more than
    :data:`MAX_TOKEN` non-space characters and a line of more than ``limit``
    characters are cut in the middle, saying how much was cut.

    >>> clean_message("no column 'a\\x1b[2Jb'\\nsee docs")
    "no column 'a\\\\x1b[2Jb' see docs"
    >>> len(clean_message("x" * 1_000_000)) < 200
    True
    """
    text = " ".join(_cut(word, MAX_TOKEN, 20) for word in str(value).split())
    return _escape(_cut(text, limit, 200))


def one_line(exc: BaseException, limit: int = 300) -> str:
    """A short one-line description of a library's exception (DuckDB, Spark/Py4J, the OS).

    A Python traceback inside the message (a Spark worker's) gives its last
    line; otherwise the first line, without a leading ``"... Error: "`` prefix.
    """
    import re

    text = str(exc).strip()
    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    if not lines:
        return type(exc).__name__
    if "Traceback" in text:
        tail = [ln for ln in lines if not ln.startswith(("at ", "File ", "^", "~"))]
        line = tail[-1]
    else:
        line = re.sub(r"^[A-Za-z ]*Error: ", "", lines[0])
    return " ".join(line.split())[:limit]


class ArflowError(Exception):
    """Base class of errors caused by input or configuration (not bugs).

    The message is one line that names what is wrong and how to fix it
    (made safe and short by :func:`clean_message`). ``exit_code`` is what
    the command line returns for it.
    """

    exit_code = 2

    def __init__(self, message: object = "", *args: object) -> None:
        super().__init__(clean_message(message), *args)


class SettingsError(ArflowError):
    """A job file or settings value is missing, unknown, mistyped or impossible."""

    exit_code = 2


class DataError(ArflowError):
    """A source, data or target error (exit code 3): the base of :class:`SourceError` and :class:`PublishError`."""

    exit_code = 3


class SourceError(DataError):
    """The source cannot be read or does not have the expected shape."""

    exit_code = 3


class SchemaError(SourceError):
    """A column is missing or has the wrong type."""


class SourceAccessError(SourceError):
    """The source query tried to reach something outside the job's named source (a file, the network, an extension)."""


class PublishError(DataError):
    """The target warehouse refused the run (locked, unreachable); nothing was changed."""

    exit_code = 3
