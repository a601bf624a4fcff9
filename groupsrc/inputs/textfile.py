"""Reading text inputs (analysis file, tables) as UTF-8, with messages a user can act on."""

from __future__ import annotations

from pathlib import Path


class TextFileError(ValueError):
    """A text input that cannot be read as UTF-8; ``what`` and ``fix`` go into a Problem."""

    def __init__(self, what, fix):
        super().__init__(what)
        self.what, self.fix = what, fix


_SAVE_UTF8 = ("save it as UTF-8 (in a spreadsheet or editor: 'Save as', text, "
              "character set / encoding UTF-8)")
_WIDE_BOMS = {b"\xff\xfe\x00\x00": "UTF-32", b"\x00\x00\xfe\xff": "UTF-32",
              b"\xff\xfe": "UTF-16", b"\xfe\xff": "UTF-16"}


def read_text(path) -> str:
    """Read a text input (analysis file or table) as UTF-8.

    Convention: text inputs are UTF-8 (TOML 1.0 requires it; BIDS requires
    it for TSV files).  A UTF-8 byte-order mark, which some spreadsheets
    and editors write, is accepted and dropped.  UTF-16/UTF-32 (with a
    byte-order mark, or recognised by NUL bytes) and anything else that is
    not valid UTF-8 (e.g. Latin-1 / Windows-1252) raise
    :class:`TextFileError` naming the line and byte.  Raises
    FileNotFoundError when the file does not exist.
    """
    path = Path(path)
    if path.is_dir():
        raise TextFileError("is a folder, not a file", "give the path of the file itself")
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise
    except OSError as exc:
        raise TextFileError(f"cannot be read ({exc.strerror or exc})",
                            "check that the file is readable") from None
    if raw.startswith(b"\xef\xbb\xbf"):
        raw = raw[3:]
    for bom, name in _WIDE_BOMS.items():
        if raw.startswith(bom):
            raise TextFileError(f"is saved as {name}, not UTF-8", _SAVE_UTF8)
    if b"\x00" in raw:
        line = raw[:raw.index(b"\x00")].count(b"\n") + 1
        raise TextFileError(f"line {line} holds NUL bytes: the file is UTF-16 without a "
                            "byte-order mark, or not a text file", _SAVE_UTF8)
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[:exc.start].count(b"\n") + 1
        raise TextFileError(f"line {line} is not valid UTF-8 (byte 0x{raw[exc.start]:02X}; "
                            "the file is probably Latin-1 / Windows-1252)", _SAVE_UTF8) from None
