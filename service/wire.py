"""Requests whose large field is left undecoded in the server process.

Decoding a 59 MiB model upload (2,000,000 label-keyed couplings) is one call into the
protobuf library of about 0.1 s that holds the interpreter lock; so is each ``ByteSize``
and ``SerializeToString`` of it. Every other call of the server, health checks included,
waits meanwhile. :func:`split` walks only the request's top-level fields (a handful of
tags, whatever the model's size) and returns the request decoded without the large field
plus that field's place in the raw bytes; the bytes go to a pool worker
(:mod:`flipfix.service.upload_jobs`), which decodes and converts them there.

:class:`Deferred` stands for such a request in the servicer: its attributes are those of
the request decoded without the field, ``raw``/``span`` locate the field's bytes and
``size`` is the whole request's.
"""

from __future__ import annotations

__all__ = ["Deferred", "split"]


class Deferred:
    """A request decoded without its field ``field`` (whose bytes are ``raw[span[0]:span[1]]``)."""

    __slots__ = ("request", "field", "raw", "span")

    def __init__(self, request, field: str, raw: bytes, span: tuple[int, int]):
        self.request = request
        self.field = field
        self.raw = raw
        self.span = span

    @property
    def size(self) -> int:
        """Bytes of the whole request, as sent."""
        return len(self.raw)

    def __getattr__(self, name: str):
        # no DESCRIPTOR either: error paths are made positional where the field is decoded
        if name in (self.field, "DESCRIPTOR"):
            raise AttributeError(f"{name!r}: the request's {self.field} is left undecoded")
        return getattr(self.request, name)


def _varint(raw: bytes, pos: int) -> tuple[int, int]:
    """(value, next position) of the varint at ``pos``; ValueError past the end or when
    longer than 10 bytes."""
    value = shift = 0
    for k in range(10):
        if pos >= len(raw):
            raise ValueError("truncated varint")
        b = raw[pos]
        pos += 1
        value |= (b & 0x7F) << shift
        if not b & 0x80:
            return value, pos
        shift += 7
    raise ValueError("varint too long")


def split(raw: bytes, number: int) -> tuple[bytes, tuple[int, int]] | None:
    """(the other top-level fields' bytes, (start, end) of field ``number``'s payload) when
    ``raw`` holds that field exactly once, length-delimited; None otherwise (and for bytes
    that do not parse: the caller then decodes as usual and reports the error)."""
    rest, span, pos = [], None, 0
    try:
        while pos < len(raw):
            start = pos
            key, pos = _varint(raw, pos)
            kind = key & 7
            if kind == 0:
                _, pos = _varint(raw, pos)
            elif kind == 1:
                pos += 8
            elif kind == 5:
                pos += 4
            elif kind == 2:
                length, pos = _varint(raw, pos)
                if key >> 3 == number:
                    if span is not None:
                        return None  # given twice: protobuf would merge them
                    span = (pos, pos + length)
                    pos += length
                    if pos > len(raw):
                        return None
                    continue
                pos += length
            else:  # groups: not in this contract
                return None
            if pos > len(raw):
                return None
            rest.append(raw[start:pos])
    except ValueError:
        return None
    if span is None:
        return None
    return b"".join(rest), span
