"""Feature hashing for strings: character n-grams and tagged tokens to column indices.

An n-gram's hash is a 64-bit polynomial hash of its UTF-8 bytes (base ``P``, mod 2**64),
XORed with a salt for its length and the seed, multiplied by an odd constant; the column
is the top ``log2(n_features)`` bits (multiplicative hashing, whose high bits are well
mixed). It is computed for a whole batch with a few numpy calls (no Python loop per
n-gram), and it is stable across processes and machines, unlike Python's ``hash``.

Written here rather than taken from scikit-learn's ``HashingVectorizer``: that one runs a
Python analyzer per document (measured about 6x slower in batch and 1000x slower for one
URL) and cannot say which substring made a column, which ``explain`` needs.
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import lru_cache
from hashlib import blake2b

import numpy as np

__all__ = [
    "END",
    "MAX_TOKEN_BYTES",
    "START",
    "char_ngram_hashes",
    "char_ngram_hashes_one",
    "columns",
    "token_hashes",
]

_P = np.uint64(0x100000001B3)  # the FNV-1a 64-bit prime, as the polynomial base
_MIX = np.uint64(0x9E3779B97F4A7C15)  # 2**64 / golden ratio, odd: multiplicative hashing
_GOLDEN = 0x9E3779B97F4A7C15

START = b"\x02"  # marks the start and end of a text, so n-grams can anchor to them
END = b"\x03"
MAX_TOKEN_BYTES = 64


def _salt(seed: int, n: int) -> int:
    return ((seed + 1) * 0xD6E8FEB86659FD93 + n * 0x632BE59BD9B4E019) & 0xFFFFFFFFFFFFFFFF


def char_ngram_hashes(
    texts: Sequence[str], ngram_range: tuple[int, int], seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Hash every character n-gram (UTF-8 bytes, with start/end markers) of each text.

    Returns ``(rows, hashes)``: the index of the text each n-gram came from, and its mixed
    64-bit hash, ordered by n, then text, then position. n-grams never cross texts.
    """
    lo, hi = ngram_range
    encoded = [START + t.encode("utf-8", "surrogatepass") + END for t in texts]
    lengths = np.fromiter((len(e) for e in encoded), dtype=np.int64, count=len(encoded))
    buf = np.frombuffer(b"".join(encoded), dtype=np.uint8).astype(np.uint64)
    total = buf.shape[0]
    rows = np.repeat(np.arange(len(encoded), dtype=np.int64), lengths)
    room = np.repeat(np.cumsum(lengths), lengths) - np.arange(total, dtype=np.int64)
    out_rows: list[np.ndarray] = []
    out_hash: list[np.ndarray] = []
    h = buf
    for n in range(1, min(hi, total) + 1):
        if n > 1:
            h = h[:-1] * _P + buf[n - 1 :]
        if n >= lo:
            valid = room[: h.shape[0]] >= n
            out_rows.append(rows[: h.shape[0]][valid])
            out_hash.append((h[valid] ^ np.uint64(_salt(seed, n))) * _MIX)
    if not out_rows:
        return np.zeros(0, np.int64), np.zeros(0, np.uint64)
    return np.concatenate(out_rows), np.concatenate(out_hash)


@lru_cache(maxsize=64)
def _powers(lo: int, hi: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """``M[k, n-lo] = P**(n-1-k)`` for k < n (else 0), and the salt of each n."""
    M = np.zeros((hi, hi - lo + 1), dtype=np.uint64)
    for n in range(lo, hi + 1):
        for k in range(n):
            M[k, n - lo] = pow(int(_P), n - 1 - k, 1 << 64)
    salts = np.array([_salt(seed, n) for n in range(lo, hi + 1)], dtype=np.uint64)
    return M, salts


@lru_cache(maxsize=4096)
def _window_index(length: int, lo: int, hi: int) -> tuple[np.ndarray, np.ndarray]:
    """For a text of ``length`` bytes: the byte index of every ``hi``-wide window (padded
    past the end), and which (position, n) cells are real n-grams, flat in n-major order."""
    windows = np.arange(length)[:, None] + np.arange(hi)[None, :]
    width = hi - lo + 1
    cells = [i * width + (n - lo) for n in range(lo, hi + 1) for i in range(length - n + 1)]
    return windows, np.array(cells, dtype=np.int64)


def char_ngram_hashes_one(text: str, ngram_range: tuple[int, int], seed: int) -> np.ndarray:
    """``char_ngram_hashes`` of one text, same values and order, in a handful of numpy calls
    (the request path): all windows times a matrix of powers gives every n-gram at once."""
    lo, hi = ngram_range
    data = START + text.encode("utf-8", "surrogatepass") + END
    M, salts = _powers(lo, hi, seed)
    windows, cells = _window_index(len(data), lo, hi)
    buf = np.frombuffer(data + b"\x00" * hi, dtype=np.uint8).astype(np.uint64)
    H = (buf[windows] @ M) ^ salts
    return H.ravel()[cells] * _MIX


def token_hashes(
    token_lists: Sequence[Sequence[tuple[str, str]]], seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Hash whole tagged tokens ``(place, word)`` with keyed BLAKE2b: the same word in
    another place is another feature. Returns ``(rows, hashes)`` as ``char_ngram_hashes``.
    (A handful of tokens per URL: a cached C hash per token beats numpy set-up here.)"""
    cache = _TOKEN_CACHE.setdefault(seed, {})
    if len(cache) > 1 << 18:
        cache.clear()  # bounded memory (~250 bytes an entry)
    counts = [len(tokens) for tokens in token_lists]
    hashes = [cache.get(t) or _token_hash(cache, t, seed) for tokens in token_lists
              for t in tokens]
    rows = np.repeat(np.arange(len(token_lists), dtype=np.int64), counts)
    return rows, np.array(hashes, dtype=np.uint64)


# tokens repeat across URLs (path words, suffixes, domains): a cache makes most free
_TOKEN_CACHE: dict[int, dict[tuple[str, str], int]] = {}


def _token_hash(cache: dict[tuple[str, str], int], token: tuple[str, str], seed: int) -> int:
    place, word = token
    data = (place + "\x1f" + word).encode("utf-8", "surrogatepass")[:MAX_TOKEN_BYTES]
    key = seed.to_bytes(8, "little", signed=True)
    value = int.from_bytes(blake2b(data, digest_size=8, key=key).digest(), "little") or 1
    cache[token] = value
    return value


def columns(hashes: np.ndarray, n_features: int) -> np.ndarray:
    """Column index of each hash: its top bits (``n_features`` must be a power of two)."""
    shift = np.uint64(64 - (n_features.bit_length() - 1))
    return (hashes >> shift).astype(np.intp)
