"""What is wrong with a source, in a user's words (scan tables, build summaries, reader errors)."""
from __future__ import annotations

from ..errors import WarmstartError

__all__ = ["describe_failure"]


# Library messages that mean something a user can act on, in the user's words. Matched on the
# message text (case-insensitive); the library's own words follow in brackets.
_PLAIN = (
    ("incompatible keyframe", "its pages differ in size or pixel type, so they are not one stack"),
    ("not a tiff file", "not a TIFF file (damaged, or another format with a .tif name)"),
    ("invalid tiff", "a damaged TIFF file"),
    ("truncated", "the file is cut short (truncated)"),
    ("unexpected end", "the file is cut short (truncated)"),
    ("cannot reshape", "the file holds fewer pixels than its header says (truncated or damaged)"),
    ("buffer is smaller", "the file holds fewer pixels than its header says (truncated or damaged)"),
    ("mmap length is greater", "the file holds fewer pixels than its header says (truncated or damaged)"),
    ("invalid dicom", "not a readable DICOM file"),
    ("permission denied", "permission denied: the file cannot be read"),
)
_PLAIN_TYPES = {
    "ZeroDivisionError": "its header describes an empty or zero-sized image",
    "MemoryError": "too large to read with the memory available",
    "UnicodeDecodeError": "its header holds text that cannot be decoded (damaged)",
    "EOFError": "the file is cut short (truncated)",
}


def describe_failure(err: BaseException, path: str | None = None) -> str:
    """One line for a scan table or build summary: what is wrong with a source, in a user's words.

    Our own errors already say it (they name the file and the problem). Anything a reader library
    raised is put into words where its message is known (:data:`_PLAIN`), with the library's own
    message kept in brackets for whoever reports it; ``path`` names the file.
    """
    if isinstance(err, WarmstartError):
        return str(err)
    where = f"{path}: " if path else ""
    text = str(err)
    for needle, words in _PLAIN:
        if needle in text.lower():
            return f"{where}{words} ({text})"
    if isinstance(err, OSError) and err.strerror:
        return f"{where}cannot be read: {err.strerror.lower()}"
    name = type(err).__name__
    if name in _PLAIN_TYPES:
        return f"{where}{_PLAIN_TYPES[name]} ({name}: {text})" if text else f"{where}{_PLAIN_TYPES[name]}"
    return f"{where}cannot be read as an image volume ({name}: {text})"
