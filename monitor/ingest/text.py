"""Raw export bytes to normalised UTF-8 text: encoding, line endings, header line and delimiter."""

from __future__ import annotations

import codecs
import csv
import re
from concurrent.futures import Executor
from dataclasses import dataclass

import numpy as np

from monitor.errors import ExportError
from monitor.ingest.profile import FALLBACK_ENCODINGS, FeedProfile

Text = bytes  # decoded export text: UTF-8, BOM removed, every line ending "\n"
_UTF8_BOM = codecs.BOM_UTF8
_UTF16_BOMS = (codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)
_UTF32_BOMS = (codecs.BOM_UTF32_LE, codecs.BOM_UTF32_BE)
_SNIFF_ORDER = (",", ";", "\t")
# The longest line an export may have, in bytes of its UTF-8 text without the line end. A checkweigher line is
# well under a kilobyte; 1 MiB leaves room for long lot codes and notes, and keeps a file that is one huge
# line (a dump, a binary stream without line ends) to a plain error instead of a parser failure.
MAX_LINE_BYTES = 1 << 20
# Python's csv module refuses fields above its limit (128 KiB by default); any field of a line within the
# bound must split (the header, and rows the parser hands back).
csv.field_size_limit(max(csv.field_size_limit(), MAX_LINE_BYTES + 1))
# Control bytes that no text export holds (all of C0 but tab, line feed, vertical tab, form feed, return).
_NOT_SPACE = re.compile(rb"[^ \t\n\r\x0b\x0c]")
_CONTROL = re.compile(rb"[\x00-\x08\x0e-\x1f]")
# Leading bytes of common non-text files, so the error can say what the file looks like.
_SIGNATURES = ((b"PK\x03\x04", "a ZIP archive (a spreadsheet workbook is one)"), (b"\x1f\x8b", "gzip data"),
               (b"%PDF", "a PDF document"), (b"\x89PNG", "a PNG image"), (b"\xff\xd8\xff", "a JPEG image"),
               (b"\xd0\xcf\x11\xe0", "an OLE2 compound file (an old spreadsheet workbook is one)"),
               (b"SQLite format 3\x00", "an SQLite database"))


@dataclass(frozen=True)
class Header:
    """The header line: its 1-based physical line number, fields, delimiter and where the body starts."""

    line: int
    names: tuple[str, ...]
    delimiter: str
    body_start: int


def decode_large(data: bytes, profile: FeedProfile, name: str, pool: Executor | None = None) -> Text:
    """What ``decode`` gives for a large file: the bytes themselves when they are the text already.

    A file of ASCII bytes without NUL or carriage return (the usual export) in an 8-bit or UTF-8 encoding
    is its own decoded text (no byte-order mark can be ASCII), so it is checked in place and not copied;
    any other file is decoded as ``decode`` does. ``pool`` runs part of the check.
    """
    if profile.encoding in ("auto", *FALLBACK_ENCODINGS, "utf-8") and len(data):
        view = np.frombuffer(data, dtype=np.uint8)
        # the largest byte on a worker thread (numpy lets go of the GIL) while this one looks for NUL and CR
        top = pool.submit(np.max, view) if pool is not None else None
        plain = data.find(b"\x00") < 0 and data.find(b"\r") < 0
        ascii_only = int(top.result() if top is not None else view.max()) < 0x80
        del view, top
        if plain and ascii_only:
            _refuse_empty(data, name, len(data))
            return data
    return decode(data, profile, name)


def decode(data: bytes, profile: FeedProfile, name: str) -> bytes:
    """UTF-8 bytes of the export with BOM removed and every line ending turned into ``\\n``.

    Raises ExportError naming the line of the first byte that does not decode, "empty file" for a file of
    nothing but whitespace (or a BOM), and "not a text file" (naming what was found) for binary data.
    """
    enc = profile.encoding
    eight_bit = enc in ("auto", *FALLBACK_ENCODINGS, "utf-8") and not data.startswith((*_UTF16_BOMS, *_UTF32_BOMS))
    if eight_bit:  # a NUL byte here is a NUL character in the text too: refused before decoding
        _refuse_binary(data, name, strict=False)
    out: bytes | None = None  # set when the input already is the UTF-8 we want (no copy, no re-encode)
    if enc in ("auto", *FALLBACK_ENCODINGS, "utf-8"):
        if data.startswith(_UTF8_BOM):
            out = data[len(_UTF8_BOM):]
            if not out.isascii():
                _strict(out, "utf-8", name, offset=len(_UTF8_BOM), raw=data)
        elif enc != "utf-8" and data.startswith(_UTF32_BOMS):
            text = _strict(data, "utf-32", name, raw=data)
        elif enc != "utf-8" and data.startswith(_UTF16_BOMS):
            text = _strict(data, "utf-16", name, raw=data)
        else:
            try:
                if not data.isascii():  # ASCII is UTF-8; isascii() is far cheaper than decoding
                    data.decode("utf-8")
                out = data
            except UnicodeDecodeError as exc:
                if enc in ("auto", "utf-8"):
                    _refuse_binary(data, name, strict=True)
                    raise _undecodable(exc, data, name, "utf-8", 0,
                                       'set encoding = "latin-1" or "cp1252" in the feed profile if the '
                                       "weigher writes 8-bit text") from None
                text = _strict(data, enc, name, raw=data)
    else:
        text = _strict(data, enc, name, raw=data)
        if text.startswith("\ufeff"):
            text = text[1:]
    if out is None:
        out = text.encode("utf-8")
    if not eight_bit and b"\x00" in out:
        pos = out.index(b"\x00")
        raise ExportError(f"not a text file in encoding {enc}: it decodes to NUL characters (first on this line)",
                          path=name, line=_line_of_bytes(out, pos),
                          hint="check the encoding in the feed profile, or the file is not an export")
    _refuse_empty(out, name, len(data))
    if b"\r" in out:
        out = out.replace(b"\r\n", b"\n")
        if b"\r" in out:  # old-style CR-only line ends
            out = out.replace(b"\r", b"\n")
    return out


def _refuse_binary(data: bytes, name: str, *, strict: bool) -> None:
    """Raise "not a text file" for data with NUL bytes (or, when ``strict``, any control byte no text holds).

    ``strict`` is for data that already failed to decode as UTF-8: 8-bit text (Latin-1 ...) has no control
    bytes, binary data nearly always has some.
    """
    pos = data.find(b"\x00")
    if pos < 0 and strict:
        hit = _CONTROL.search(data)
        pos = hit.start() if hit else -1
    if pos < 0:
        return
    what = next((f"; it looks like {kind}" for sig, kind in _SIGNATURES if data.startswith(sig)), "")
    byte = "NUL byte" if data[pos] == 0 else f"control byte 0x{data[pos]:02x}"
    utf16 = pos < 64 and _looks_utf16(data)
    raise ExportError(f"not a text file: {byte} at offset {pos}{what}", path=name, line=_line_of_bytes(data, pos),
                      hint='a UTF-16 export needs a BOM, or set encoding = "utf-16-le" in the feed profile'
                      if utf16 else "the reader takes text exports (CSV); check what the weigher wrote here")


def _looks_utf16(data: bytes) -> bool:
    """True when the first bytes alternate text and NUL as UTF-16 text without a BOM does."""
    head = data[:64]
    if len(head) < 4:
        return False
    even, odd = head[0::2], head[1::2]
    return even.count(0) == len(even) or odd.count(0) == len(odd)


def _refuse_empty(buf: Text, name: str, size: int) -> None:
    """Raise "empty file" when the decoded text is nothing but whitespace (a BOM is already gone)."""
    first = _NOT_SPACE.search(buf)  # stops at the first byte that is not ASCII whitespace: no copy
    if first is not None and (buf[first.start()] < 0x80 or str(buf[first.start():], "utf-8").strip()):
        return
    what = "0 bytes" if size == 0 else "only a byte-order mark" if not buf else "only whitespace"
    raise ExportError(f"empty file ({what})", path=name,
                      hint="the file has no header and no rows; an export needs a header naming its columns")


def check_line_lengths(buf: Text, name: str, limit: int = MAX_LINE_BYTES) -> None:
    """Raise ExportError naming the first line longer than ``limit`` bytes (line end not counted).

    Steps a window of ``limit + 1`` bytes at a time, each step ending after the window's last line end, so a
    file of short lines costs one ``rfind`` per ``limit`` bytes and nothing is copied.
    """
    pos, size = 0, len(buf)
    while size - pos > limit:
        nl = buf.rfind(b"\n", pos, pos + limit + 1)
        if nl < 0:
            line = buf.count(b"\n", 0, pos) + 1
            raise ExportError(f"line {line} is longer than {limit:,} bytes; an export line is at most "
                              f"{limit:,} bytes", path=name, line=line,
                              hint="the file is not an export of one row per line (line ends missing?)")
        pos = nl + 1


def find_header(buf: Text, profile: FeedProfile, name: str) -> Header:
    """Locate the header line (after ``skip_lines``, first non-blank or first starting ``header_prefix``)."""
    pos, line = 0, 1
    for _ in range(profile.skip_lines):
        nl = buf.find(b"\n", pos)
        if nl < 0:
            raise ExportError(f"file ends before the header: it has {line} line(s) but the profile skips "
                              f"{profile.skip_lines}", path=name, line=line, hint="check skip_lines in the profile")
        pos, line = nl + 1, line + 1
    prefix = profile.header_prefix.encode("utf-8")
    while True:
        if pos >= len(buf):
            what = f"no line starts with {profile.header_prefix!r}" if prefix else "no header line"
            raise ExportError(f"{what} — the file has no header naming its columns", path=name, line=line,
                              hint="the header must name at least 'lot' and 'value'")
        nl = buf.find(b"\n", pos)
        end = len(buf) if nl < 0 else nl
        raw = buf[pos:end]
        if (raw.startswith(prefix) if prefix else raw.strip() != b""):
            break
        pos, line = end + 1, line + 1
    text = raw.decode("utf-8")
    delim = profile.delimiter
    if delim == "auto":  # with a decimal comma, "," cannot be the field separator
        delim = sniff_delimiter(text, (";", "\t") if profile.decimal == "," else _SNIFF_ORDER)
    names = tuple(f.strip() for f in next(csv.reader([text], delimiter=delim, strict=False), []))
    return Header(line=line, names=names, delimiter=delim, body_start=min(end + 1, len(buf)))


def sniff_delimiter(header: str, candidates: tuple[str, ...] = _SNIFF_ORDER) -> str:
    """The candidate occurring most often in the header line (outside quotes); the first on a tie or none."""
    outside = header.split('"')[0::2]
    counts = {d: sum(part.count(d) for part in outside) for d in candidates}
    return max(candidates, key=lambda d: counts[d])


def _strict(data: bytes, enc: str, name: str, *, offset: int = 0, raw: bytes) -> str:
    try:
        return data.decode(enc)
    except UnicodeDecodeError as exc:
        raise _undecodable(exc, raw, name, enc, offset, "check the encoding in the feed profile") from None
    except (LookupError, ValueError) as exc:
        raise ExportError(f"cannot decode as {enc}: {exc}", path=name) from None


def _undecodable(exc: UnicodeDecodeError, raw: bytes, name: str, enc: str, offset: int, hint: str) -> ExportError:
    start = exc.start + offset
    newline = _newline_bytes(enc, raw)
    line = raw[:start].count(newline) + 1
    bad = raw[start:start + 4]
    return ExportError(f"bytes {bad!r} are not valid {enc} text", path=name, line=line, hint=hint)


def _newline_bytes(enc: str, raw: bytes) -> bytes:
    if enc in ("utf-16", "utf-32"):
        enc += "-le" if raw.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF32_LE)) else "-be"
    try:
        return "\n".encode(enc) or b"\n"
    except (LookupError, ValueError, UnicodeError):
        return b"\n"


def _line_of_bytes(buf: bytes, pos: int) -> int:
    part = buf[:pos]
    return part.count(b"\n") + part.count(b"\r") - part.count(b"\r\n") + 1
