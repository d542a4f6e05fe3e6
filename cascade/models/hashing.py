"""Feature hashing for strings: character n-grams and tagged tokens to column indices.

The hash is a 64-bit polynomial rolling hash over UTF-8 bytes, finished with the
MurmurHash3 64-bit finalizer (``fmix64``) and a seed; columns are the low bits. It is
computed for a whole batch at once with numpy (no Python loop per n-gram), and it is stable
across processes and machines, unlike Python's ``hash``. Written here rather than taken
from scikit-learn's ``HashingVectorizer`` because that one hashes in a Python-level analyzer
per document and cannot tell us which substring made a column (``explain`` needs that).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

_P = np.uint64(0x100000001B3)  # FNV-1a 64-bit prime, used as the polynomial base
_M1 = np.uint64(0xFF51AFD7ED558CCD)  # fmix64 constants (MurmurHash3)
_M2 = np.uint64(0xC4CEB9FE1A85EC53)
_S33 = np.uint64(33)
_GOLDEN = 0x9E3779B97F4A7C15

START = b"\x02"  # marks the start and end of a text, so n-grams can anchor to them
END = b"\x03"
TAG_SEPARATOR = b"\x1f"
MAX_TOKEN_BYTES = 64


def _fmix(h: np.ndarray, salt: int) -> np.ndarray:
    h = h ^ np.uint64(salt & 0xFFFFFFFFFFFFFFFF)
    h ^= h >> _S33
    h *= _M1
    h ^= h >> _S33
    h *= _M2
    h ^= h >> _S33
    return h


def _salt(seed: int, kind: int) -> int:
    return (seed * _GOLDEN + kind * 0x632BE59BD9B4E019) & 0xFFFFFFFFFFFFFFFF


def char_ngram_hashes(
    texts: Sequence[str], ngram_range: tuple[int, int], seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Hash every character n-gram (over UTF-8 bytes, with start/end markers) of each text.

    Returns ``(rows, hashes)``: the index of the text each n-gram came from, and its
    64-bit hash. n-grams never cross from one text into the next.
    """
    lo, hi = ngram_range
    encoded = [START + t.encode("utf-8", "surrogatepass") + END for t in texts]
    lengths = np.fromiter((len(e) for e in encoded), dtype=np.int64, count=len(encoded))
    buf = np.frombuffer(b"".join(encoded), dtype=np.uint8).astype(np.uint64)
    total = buf.shape[0]
    if total == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.uint64)
    rows = np.repeat(np.arange(len(encoded), dtype=np.int64), lengths)
    room = np.repeat(np.cumsum(lengths), lengths) - np.arange(total, dtype=np.int64)
    out_rows: list[np.ndarray] = []
    out_hash: list[np.ndarray] = []
    h = buf.copy()
    for n in range(1, hi + 1):
        if n > 1:
            if total - n + 1 <= 0:
                break
            h = h[:-1] * _P + buf[n - 1 :]
        if n >= lo:
            valid = room[: h.shape[0]] >= n
            out_rows.append(rows[: h.shape[0]][valid])
            out_hash.append(_fmix(h[valid], _salt(seed, n)))
    if not out_rows:
        return np.zeros(0, np.int64), np.zeros(0, np.uint64)
    return np.concatenate(out_rows), np.concatenate(out_hash)


def token_hashes(
    token_lists: Sequence[Sequence[tuple[str, str]]], seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Hash whole tagged tokens ``(place, word)``: the same word in another place is
    another feature. Returns ``(rows, hashes)`` as ``char_ngram_hashes`` does."""
    encoded: list[bytes] = []
    counts = np.zeros(len(token_lists), dtype=np.int64)
    for i, tokens in enumerate(token_lists):
        counts[i] = len(tokens)
        for place, word in tokens:
            encoded.append(
                (place.encode() + TAG_SEPARATOR + word.encode("utf-8", "surrogatepass"))[
                    :MAX_TOKEN_BYTES
                ]
            )
    if not encoded:
        return np.zeros(0, np.int64), np.zeros(0, np.uint64)
    lengths = np.fromiter((len(e) for e in encoded), dtype=np.int64, count=len(encoded))
    buf = np.frombuffer(b"".join(encoded), dtype=np.uint8).astype(np.uint64)
    starts = np.concatenate(([0], np.cumsum(lengths)[:-1]))
    token_id = np.repeat(np.arange(len(encoded)), lengths)
    position = np.arange(buf.shape[0]) - starts[token_id]
    exponent = lengths[token_id] - 1 - position
    powers = _powers(int(lengths.max()))
    hashes = np.add.reduceat(buf * powers[exponent], starts)
    rows = np.repeat(np.arange(len(token_lists), dtype=np.int64), counts)
    return rows, _fmix(hashes, _salt(seed, 101))


_POWERS = np.ones(1, dtype=np.uint64)


def _powers(n: int) -> np.ndarray:
    global _POWERS
    if _POWERS.shape[0] < n:
        values = [1]
        for _ in range(max(n, MAX_TOKEN_BYTES) - 1):
            values.append(values[-1] * int(_P) % (1 << 64))
        _POWERS = np.array(values, dtype=np.uint64)
    return _POWERS


def columns(hashes: np.ndarray, n_features: int) -> np.ndarray:
    """Column index of each hash (``n_features`` must be a power of two)."""
    return (hashes & np.uint64(n_features - 1)).astype(np.int64)
