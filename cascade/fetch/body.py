"""Reading a response body within caps: bytes off the wire, bytes after Content-Encoding,
and the number of encoding layers. Written here because httpx has no maximum body size;
decoding is zlib's, streamed with ``max_length`` so a bomb never expands past the cap.
"""

from __future__ import annotations

import asyncio
import zlib
from collections.abc import AsyncIterator

__all__ = ["BadEncoding", "BodyTooLarge", "parse_encodings", "read_capped"]


class BodyTooLarge(Exception):  # noqa: N818 - internal signal, mapped to an outcome
    def __init__(self, what: str) -> None:
        super().__init__(what)


class BadEncoding(Exception):  # noqa: N818 - internal signal, mapped to an outcome
    pass


def parse_encodings(header: str | None, max_layers: int) -> list[str]:
    """Content-Encoding values in the order applied; ``identity`` dropped.
    Raises ``BadEncoding`` for an unsupported coding or too many layers."""
    if not header:
        return []
    codings = [c.strip().lower() for c in header.split(",") if c.strip()]
    codings = [c for c in codings if c != "identity"]
    for c in codings:
        if c not in ("gzip", "x-gzip", "deflate"):
            raise BadEncoding(f"unsupported Content-Encoding {c!r}")
    if len(codings) > max_layers:
        raise BadEncoding(f"{len(codings)} Content-Encoding layers (at most {max_layers})")
    return codings


class _Layer:
    def __init__(self, coding: str) -> None:
        self.coding = coding
        # gzip: wbits 16+15; deflate: zlib stream, with raw deflate tried if the first
        # bytes are not a zlib header (servers send both under the name "deflate")
        self._d = zlib.decompressobj(31 if coding in ("gzip", "x-gzip") else 15)
        self._started = False

    async def feed(self, data: bytes, room: int) -> tuple[bytes, bool]:
        """Decode ``data``; at most ``room`` bytes come back, with True when more would
        have come (the cap is passed: nothing past it is ever decoded). Decoded in steps
        of ``_STEP`` bytes with the event loop let in between: a bomb's megabytes never
        hold it for long."""
        if not self._started and self.coding == "deflate" and data:
            self._started = True
            if (data[0] & 0x0F) != 8:
                self._d = zlib.decompressobj(-15)
        self._started = True
        parts: list[bytes] = []
        got = 0
        pending = data
        while True:
            step = min(room + 1 - got, _STEP)
            try:
                out = self._d.decompress(pending, step)
            except zlib.error as exc:
                raise BadEncoding(f"{self.coding} data is corrupt: {exc}") from None
            parts.append(out)
            got += len(out)
            pending = self._d.unconsumed_tail
            if got > room:
                return b"".join(parts)[:room], True
            if not pending:
                return b"".join(parts), False
            await asyncio.sleep(0)

    def finish(self) -> None:
        """The stream ended: a compressed stream cut short is broken, not a page."""
        if self._started and not self._d.eof:
            raise BadEncoding(f"{self.coding} stream is truncated (ended before its end mark)")


#: After this many pieces of body the reader lets the event loop run other fetches: a
#: server that sends a body in tiny chunks makes thousands of pieces out of one socket read.
YIELD_EVERY = 64
#: Bytes decoded per step of one Content-Encoding layer.
_STEP = 256 << 10


async def read_capped(
    chunks: AsyncIterator[bytes], encodings: list[str], max_bytes: int, max_decoded: int,
    truncate: bool = False, max_pieces: int | None = None,
) -> tuple[bytes, int]:
    """Read all chunks; return ``(decoded body, body bytes received)``.

    Raises ``BodyTooLarge`` as soon as a cap is passed (nothing more is read), or, with
    ``truncate``, stops reading there and returns what fits (robots.txt: RFC 9309 section
    2.5 lets a parser ignore what lies past its limit). A compressed stream that ends
    before its end mark raises ``BadEncoding`` (unless truncated on purpose).

    ``max_pieces`` bounds the number of pieces (one per chunk of a chunked body, one per
    socket read otherwise): parsing each costs CPU whatever its size, so a body of
    one-byte chunks is stopped by count long before its bytes reach the cap."""
    layers = [_Layer(c) for c in reversed(encodings)]
    wire = 0
    pieces = 0
    out = bytearray()
    async for chunk in chunks:
        pieces += 1
        if max_pieces is not None and pieces > max_pieces:
            raise BodyTooLarge(f"more than {max_pieces} body chunks")
        if pieces % YIELD_EVERY == 0:
            await asyncio.sleep(0)
        if truncate and wire + len(chunk) > max_bytes:
            chunk = chunk[: max_bytes - wire]
        wire += len(chunk)
        if wire > max_bytes:
            raise BodyTooLarge(f"more than {max_bytes} bytes on the wire")
        data = chunk
        over = False
        for layer in layers:  # each layer within what is left of the decoded cap
            data, passed = await layer.feed(data, max_decoded - len(out))
            over = over or passed
        if over or len(out) + len(data) > max_decoded:
            if not truncate:
                raise BodyTooLarge(f"more than {max_decoded} bytes after decoding")
            out += data[: max_decoded - len(out)]  # robots.txt: the part within the cap
            return bytes(out), wire
        out += data
        if truncate and (wire >= max_bytes or len(out) >= max_decoded):
            return bytes(out), wire
    for layer in layers:
        layer.finish()
    return bytes(out), wire
