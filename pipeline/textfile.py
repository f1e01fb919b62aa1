"""Delivered text files -> str, with a one-line error naming the line of the first undecodable byte.

Reads one file; writes nothing. Used by ingestion (format key `encoding`) and the station table.
A UTF-8 byte-order mark is skipped (spreadsheet programs write one); line ends may be LF or CRLF.
"""

import codecs
from pathlib import Path

from pipeline.errors import InputError


def decoder_name(encoding: str) -> str:
    """The codec to read with: UTF-8 is read as utf-8-sig, which drops a leading BOM and nothing else."""
    return "utf-8-sig" if codecs.lookup(encoding).name == "utf-8" else encoding


FORMAT_HINT = "convert the file or set the format's encoding (e.g. latin-1, cp1252)"


def read_text(path, encoding: str = "utf-8", hint: str = FORMAT_HINT) -> str:
    """The whole file as text; InputError FILE:LINE: encoding naming the first byte that does not decode."""
    return decode_text(Path(path).read_bytes(), path, encoding, hint)


def decode_text(data: bytes, path, encoding: str = "utf-8", hint: str = FORMAT_HINT) -> str:
    """`read_text` on bytes already read (the error names `path` and the line of the bad byte)."""
    try:
        return data.decode(decoder_name(encoding))
    except UnicodeDecodeError as error:
        line = data[:error.start].count(b"\n") + 1
        raise InputError(f"byte 0x{data[error.start]:02x} is not valid {encoding}; {hint}", file=str(path),
                         row=line, field="encoding") from None
