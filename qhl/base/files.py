"""Reading input files as text with one-line errors (every reader of qhl goes through here), and
writing figures so that a failed write is an error (save_figure)."""

import io
from pathlib import Path

from .errors import QhlInputError

__all__ = ["read_text_file", "save_figure"]


def read_text_file(path, max_bytes: int, source: str | None = None, encoding: str = "utf-8") -> str:
    """The file as text; missing, unreadable, larger than `max_bytes` or undecodable -> QhlInputError.

    Args:
        path: the file; max_bytes: size limit (checked before reading); source: name in messages
            (default the path); encoding: 'utf-8' or 'utf-8-sig' (a leading byte-order mark dropped).

    Example:
        >>> import tempfile, os
        >>> with tempfile.NamedTemporaryFile("wb", suffix=".txt", delete=False) as f:
        ...     _ = f.write(b"\\xff")
        >>> try:
        ...     read_text_file(f.name, 100, source="x.txt")
        ... except QhlInputError as e:
        ...     print(e)
        x.txt: line 1: byte 0xff is not UTF-8 text
        >>> os.unlink(f.name)
    """
    path = Path(path)
    src = str(path) if source is None else source
    try:
        size = path.stat().st_size
        if size > max_bytes:
            raise QhlInputError(f"file of {size:,} bytes; expected at most {max_bytes:,}", source=src)
        data = path.read_bytes()
    except FileNotFoundError:
        raise QhlInputError("no such file", source=src) from None
    except IsADirectoryError:
        raise QhlInputError("a folder, not a file", source=src) from None
    except OSError as e:
        raise QhlInputError(f"cannot read file: {e.strerror or type(e).__name__}", source=src) from None
    try:
        return data.decode(encoding)
    except UnicodeDecodeError as e:
        line = data[:e.start].count(b"\n") + 1
        raise QhlInputError(f"line {line}: byte {data[e.start]:#04x} is not UTF-8 text", source=src) from None


def save_figure(fig, target, **kwargs):
    """fig.savefig(target, **kwargs), where a path is written from the PNG rendered in memory in one
    call: a failing write (a full disk, a device that refuses data) raises OSError, which writing
    through matplotlib's own file handling did not always do (measured: /dev/full passed silently).
    A file object (the HTML report's buffers) is written directly."""
    if hasattr(target, "write"):
        fig.savefig(target, **kwargs)
        return target
    buf = io.BytesIO()
    kwargs.setdefault("format", Path(target).suffix.lstrip(".").lower() or "png")
    fig.savefig(buf, **kwargs)
    Path(target).write_bytes(buf.getvalue())
    return target
