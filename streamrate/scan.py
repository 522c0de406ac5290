"""One compiled pass from stream payloads to event columns, for the common spellings.

The writer's usual path (:func:`streamrate.decode.decode_events`, then
:func:`streamrate.events.event_digests`) builds a checked :class:`MatchEvent` and
a content digest per payload. :func:`scan_payloads` does both for a whole batch
in one numba call, reading the bytes once, but only for the spellings producers
actually write; everything else it leaves to the usual path. It is *sound*, not
complete: it may answer "not sure" for any payload, and whatever it is sure of
is exactly what :func:`streamrate.events.parse_event` accepts, with the same
values and the same :func:`streamrate.events.event_digest` (``tests/test_scan.py``
holds it to the model over thousands of generated payloads).

Sure means all of: one JSON object, whitespace only between tokens (and after
it); exactly the keys ``match_id``, ``finished_at``, ``first``, ``second``,
``score`` and optionally ``context``, each once; strings without escapes; ids
and categories of printable ASCII without the space; context values strings;
``score`` spelled ``0``, ``1``, ``0.0``, ``1.0`` or ``0.5``; ``finished_at`` as
``YYYY-MM-DDTHH:MM:SS[.ffffff](Z|+HH:MM|-HH:MM)`` with a real calendar date in
the years 2000 to 2200 and up to 6 digits of a second (so that the digest's
``repr`` of the time is provably the text's own digits: see :func:`_time`);
sides of distinct ids, disjoint.

>>> s = scan_payloads([
...     b'{"match_id": "m-1", "finished_at": "2026-03-01T19:00:00.25+01:00",'
...     b' "first": ["kelvash"], "second": ["morvenn"], "score": 1,'
...     b' "context": {"mode": "duel", "map": "saltflats"}}',
...     b'{"match_id": "m-2", "finished_at": "2026-03-01T18:00:00Z", "first": ["a\\\\b"],'
...     b' "second": ["morvenn"], "score": 1}'])
>>> s.sure.tolist(), s.match_ids, s.firsts, s.times.tolist(), context_of(s.context_keys[0])
([True, False], ['m-1'], [('kelvash',)], [1772388000.25], {'mode': 'duel', 'map': 'saltflats'})
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from streamrate.events import (
    MAX_CATEGORY_CHARS,
    MAX_CONTEXT_FIELDS,
    MAX_EVENT_BYTES,
    MAX_ID_CHARS,
    MAX_NAME_CHARS,
    MAX_SIDE_SIZE,
)
from streamrate.models._jit import leaf


@dataclass(frozen=True)
class Scanned:
    """What :func:`scan_payloads` is sure of, as columns over the sure payloads."""

    sure: np.ndarray
    """bool (n,): payload i was taken by the compiled pass."""
    at: np.ndarray
    """int64 positions of the sure payloads, ascending."""
    match_ids: list[str]
    firsts: list[tuple[str, ...]]
    seconds: list[tuple[str, ...]]
    scores: np.ndarray
    """float64: 0.0, 0.5 or 1.0."""
    times: np.ndarray
    """float64 unix seconds, equal to ``datetime.fromisoformat(text).timestamp()``."""
    finished: list[str]
    """``finished_at`` as given, to build a datetime later (only when needed)."""
    context_keys: list[str]
    """The context as text, its fields in the payload's order (see :func:`context_of`):
    ``name\x1dsvalue`` joined by ``\x1f``; "" for an absent or empty one. The order
    is kept because a model adds a context's fields up in that order."""
    digests: list[bytes]
    """8 bytes each, equal to ``event_digest(parse_event(raw))``."""
    has_context: list[bool]
    """Whether the payload gave a ``context`` field (pydantic's ``model_fields_set``)."""


# -- BLAKE2b (RFC 7693), unkeyed, any digest size ---------------------------------
# The initial vector is SHA-512's (FIPS 180-4) and SIGMA the message schedule of
# RFC 7693 section 2.7, both from memory; tests/test_scan.py checks the result
# against hashlib and the RFC's Appendix A example.
_IV = np.array(
    [
        0x6A09E667F3BCC908, 0xBB67AE8584CAA73B, 0x3C6EF372FE94F82B, 0xA54FF53A5F1D36F1,
        0x510E527FADE682D1, 0x9B05688C2B3E6C1F, 0x1F83D9ABFB41BD6B, 0x5BE0CD19137E2179,
    ],
    dtype=np.uint64,
)  # fmt: skip
_SIGMA = np.array(
    [
        [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15],
        [14, 10, 4, 8, 9, 15, 13, 6, 1, 12, 0, 2, 11, 7, 5, 3],
        [11, 8, 12, 0, 5, 2, 15, 13, 10, 14, 3, 6, 7, 1, 9, 4],
        [7, 9, 3, 1, 13, 12, 11, 14, 2, 6, 5, 10, 4, 0, 15, 8],
        [9, 0, 5, 7, 2, 4, 10, 15, 14, 1, 11, 12, 6, 8, 3, 13],
        [2, 12, 6, 10, 0, 11, 8, 3, 4, 13, 7, 5, 15, 14, 1, 9],
        [12, 5, 1, 15, 14, 13, 4, 10, 0, 7, 6, 3, 9, 2, 8, 11],
        [13, 11, 7, 14, 12, 1, 3, 9, 5, 0, 15, 4, 8, 6, 2, 10],
        [6, 15, 14, 9, 11, 3, 0, 8, 12, 2, 13, 7, 1, 4, 10, 5],
        [10, 2, 8, 4, 7, 6, 1, 5, 15, 11, 9, 14, 3, 12, 13, 0],
    ],
    dtype=np.uint64,  # unsigned: indexing with it needs no negative-index wraparound
)[np.arange(12) % 10]
_U8, _U16, _U24, _U32 = np.uint64(8), np.uint64(16), np.uint64(24), np.uint64(32)
_U40, _U48, _U63, _U1 = np.uint64(40), np.uint64(48), np.uint64(63), np.uint64(1)
_U10, _ZERO = np.uint64(10), np.uint64(48)
_PARAM = np.uint64(0x01010000)  # fan-out 1, depth 1, no key
_BYTE = np.uint64(0xFF)


@leaf
def _g(a, b, c, d, x, y):  # type: ignore[no-untyped-def]
    """The mixing function G of RFC 7693 section 3.1 (rotations 32, 24, 16, 63)."""
    a = a + b + x
    d = d ^ a
    d = (d >> _U32) | (d << _U32)
    c = c + d
    b = b ^ c
    b = (b >> _U24) | (b << _U40)
    a = a + b + y
    d = d ^ a
    d = (d >> _U16) | (d << _U48)
    c = c + d
    b = b ^ c
    b = (b >> _U63) | (b << _U1)
    return a, b, c, d


@leaf
def _compress(h, m, t, last):  # type: ignore[no-untyped-def]
    """Compression F (RFC 7693 section 3.2) of the block in ``m`` into ``h``;
    ``t`` bytes hashed so far (below 2**64 here), ``last`` for the final block."""
    v0, v1, v2, v3, v4, v5, v6, v7 = h[0], h[1], h[2], h[3], h[4], h[5], h[6], h[7]
    v8, v9, v10, v11 = _IV[0], _IV[1], _IV[2], _IV[3]
    v12, v13, v14, v15 = _IV[4] ^ t, _IV[5], _IV[6], _IV[7]
    if last:
        v14 = ~v14
    for s in range(12):
        v0, v4, v8, v12 = _g(v0, v4, v8, v12, m[_SIGMA[s, 0]], m[_SIGMA[s, 1]])
        v1, v5, v9, v13 = _g(v1, v5, v9, v13, m[_SIGMA[s, 2]], m[_SIGMA[s, 3]])
        v2, v6, v10, v14 = _g(v2, v6, v10, v14, m[_SIGMA[s, 4]], m[_SIGMA[s, 5]])
        v3, v7, v11, v15 = _g(v3, v7, v11, v15, m[_SIGMA[s, 6]], m[_SIGMA[s, 7]])
        v0, v5, v10, v15 = _g(v0, v5, v10, v15, m[_SIGMA[s, 8]], m[_SIGMA[s, 9]])
        v1, v6, v11, v12 = _g(v1, v6, v11, v12, m[_SIGMA[s, 10]], m[_SIGMA[s, 11]])
        v2, v7, v8, v13 = _g(v2, v7, v8, v13, m[_SIGMA[s, 12]], m[_SIGMA[s, 13]])
        v3, v4, v9, v14 = _g(v3, v4, v9, v14, m[_SIGMA[s, 14]], m[_SIGMA[s, 15]])
    h[0] ^= v0 ^ v8
    h[1] ^= v1 ^ v9
    h[2] ^= v2 ^ v10
    h[3] ^= v3 ^ v11
    h[4] ^= v4 ^ v12
    h[5] ^= v5 ^ v13
    h[6] ^= v6 ^ v14
    h[7] ^= v7 ^ v15


@leaf
def _blake2b(data, start, length, size, h, m, out, o):  # type: ignore[no-untyped-def]
    """BLAKE2b of ``data[start:start + length]`` with a digest of ``size`` bytes (1 to
    64), written to ``out[o:o + size]``; ``h`` (8) and ``m`` (16) are uint64 scratch."""
    for k in range(8):
        h[k] = _IV[k]
    h[0] ^= _PARAM ^ np.uint64(size)
    blocks = max(1, (length + 127) // 128)
    end = start + length
    for b in range(blocks):
        p = start + 128 * b
        for k in range(16):
            q = p + 8 * k
            u = np.uint64(q)  # unsigned: no negative-index wraparound
            w = np.uint64(0)
            if q + 8 <= end:
                for j in range(_U8):
                    w |= np.uint64(data[u + j]) << (_U8 * j)
            else:
                for j in range(_U8):
                    if u + j < np.uint64(end):
                        w |= np.uint64(data[u + j]) << (_U8 * j)
            m[k] = w
        last = b == blocks - 1
        _compress(h, m, np.uint64(length if last else 128 * (b + 1)), last)
    for k in range(size):
        out[o + k] = np.uint8((h[k // 8] >> np.uint64(8 * (k % 8))) & _BYTE)


# -- the scan -----------------------------------------------------------------------
_QUOTE, _COLON, _COMMA, _BACKSLASH = 34, 58, 44, 92
_KIND = np.full(256, 2, dtype=np.uint8)
"""Per byte in a string: 0 printable ASCII but space, 1 the closing quote, 2 refused."""
_KIND[0x21:0x7F] = 0
_KIND[_QUOTE] = 1
_KIND[_BACKSLASH] = 2
_LBRACE, _RBRACE, _LBRACKET, _RBRACKET = 123, 125, 91, 93


def _word(text: bytes) -> np.uint64:
    """Up to 8 bytes as the kernel reads them: little-endian, zeros after."""
    return np.uint64(int.from_bytes(text, "little"))


_K_MATCH_ID, _K_FINISHED, _K_CONTEXT = _word(b"match_id"), _word(b"finished"), _word(b"context")
_K_FIRST, _K_SECOND, _K_SCORE = _word(b"first"), _word(b"second"), _word(b"score")
_LOW5, _LOW6, _LOW7 = np.uint64(2**40 - 1), np.uint64(2**48 - 1), np.uint64(2**56 - 1)
_MATCH_ID, _FINISHED_AT, _FIRST, _SECOND, _SCORE, _CONTEXT = range(6)
_REQUIRED = 0b11111
_DAYS = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31], dtype=np.int64)
# The per-event scratch of spans (start, length) in the payload buffer, int64:
_W_MID = 0  # match id
_W_TIME = 2  # finished_at text
_W_FRAC = 4  # fraction digits kept by repr (start, count without trailing zeros)
_W_US = 6  # the instant, integer microseconds since the epoch
_W_SCORE = 7  # 0, 1, 2: 0.0, 0.5, 1.0
_W_K = 8  # ids on each side (2)
_W_NCTX = 10  # context fields
_W_IDS = 16  # 2 * MAX_SIDE_SIZE (start, length): first side, then second
_W_CTX = _W_IDS + 4 * MAX_SIDE_SIZE  # MAX_CONTEXT_FIELDS (name start, length, value start, length)
_W_ORDER = _W_CTX + 4 * MAX_CONTEXT_FIELDS  # context fields in name order
_W_GIVEN = _W_ORDER + MAX_CONTEXT_FIELDS  # 1 when the payload has a context field
_W_SIZE = _W_GIVEN + 1
_CANON = MAX_EVENT_BYTES + 256
"""Room for an event's canonical text, which is never longer than its payload."""


@leaf
def _ws(buf, p, e):  # type: ignore[no-untyped-def]
    """The first index from ``p`` that is not JSON whitespace, or ``e``."""
    u, end = np.uint64(p), np.uint64(e)  # unsigned: no negative-index wraparound
    while u < end:
        c = buf[u]
        if c != 32 and c != 10 and c != 13 and c != 9:
            return np.int64(u)
        u += _U1
    return e


@leaf
def _string(buf, p, e):  # type: ignore[no-untyped-def]
    """Index of the closing quote of a string opened just before ``p``, or -1 when it
    does not end or holds anything but printable ASCII other than space and backslash."""
    u, end = np.uint64(p), np.uint64(e)
    while u < end:
        kind = _KIND[buf[u]]
        if kind:
            return np.int64(u) if kind == 1 else -1
        u += _U1
    return -1


@leaf
def _two(buf, p):  # type: ignore[no-untyped-def]
    """The two decimal digits at ``p`` as a number, or -1."""
    a, b = buf[p], buf[p + 1]
    if a < 48 or a > 57 or b < 48 or b > 57:
        return -1
    return 10 * (a - 48) + (b - 48)


@leaf
def _compare(buf, a, na, b, nb):  # type: ignore[no-untyped-def]
    """Bytewise order of two spans of ``buf`` (as Python orders ASCII str): -1, 0, 1."""
    for k in range(min(na, nb)):
        x, y = buf[a + k], buf[b + k]
        if x != y:
            return -1 if x < y else 1
    return -1 if na < nb else (1 if na > nb else 0)


@leaf
def _time(buf, s, q, w):  # type: ignore[no-untyped-def]
    """Read ``YYYY-MM-DDTHH:MM:SS[.f{1,6}](Z|[+-]HH:MM)`` from ``buf[s:q]`` into ``w``;
    False unless it is a real date and time of the years 2000 to 2200.

    Why ``repr(t)`` of ``t = us / 1e6`` is then the text's own digits (the integer
    part, ".", the fraction without trailing zeros, or "0"), the decimal D: in these
    years 1e8 < t < 2**33, so doubles near t lie at most 2**-20 s (under 1e-6)
    apart and ``t`` is within half that of D. With at most 15 significant digits
    (5 fraction digits kept) D round-trips and nothing shorter does (15 decimal
    digits always survive a double). With 16 (6 kept, the sixth not 0), every
    other decimal of at most 16 digits lies on the 1e-6 grid away from D or on
    the 1e-5 grid, at least 1e-6 from D, so more than half a spacing from ``t``:
    D is the only shortest string that reads back as ``t``. ``tests/test_scan.py``
    checks the rule against ``repr``."""
    if q - s < 20:
        return False
    if buf[s + 4] != 45 or buf[s + 7] != 45 or buf[s + 10] != 84:  # - - T
        return False
    if buf[s + 13] != _COLON or buf[s + 16] != _COLON:
        return False
    century, y, mo, d = _two(buf, s), _two(buf, s + 2), _two(buf, s + 5), _two(buf, s + 8)
    hh, mi, ss = _two(buf, s + 11), _two(buf, s + 14), _two(buf, s + 17)
    if century < 0 or y < 0:
        return False
    y += 100 * century
    if y < 2000 or y > 2200 or mo < 1 or mo > 12 or hh < 0 or hh > 23:
        return False
    if mi < 0 or mi > 59 or ss < 0 or ss > 59:
        return False
    leap = y % 4 == 0 and (y % 100 != 0 or y % 400 == 0)
    if d < 1 or d > _DAYS[mo - 1] + (1 if mo == 2 and leap else 0):
        return False
    p = s + 19
    frac = 0
    kept = 0
    if buf[p] == 46:  # .
        p += 1
        digits = 0
        while p < q and 48 <= buf[p] <= 57:
            frac = 10 * frac + (buf[p] - 48)
            digits += 1
            if buf[p] != 48:
                kept = digits
            p += 1
        if digits < 1 or digits > 6:
            return False
        for _ in range(digits, 6):
            frac *= 10
    w[_W_FRAC] = s + 20
    w[_W_FRAC + 1] = kept
    if p >= q:
        return False
    c = buf[p]
    offset = 0
    if c == 90:  # Z
        p += 1
    elif c == 43 or c == 45:  # + -
        if q - p != 6 or buf[p + 3] != _COLON:
            return False
        oh, om = _two(buf, p + 1), _two(buf, p + 4)
        if oh < 0 or oh > 23 or om < 0 or om > 59:
            return False
        offset = (oh * 60 + om) * (1 if c == 43 else -1)
        p += 6
    if p != q:
        return False
    # Days from the civil date (March-based years, 400-year eras of 146097 days).
    yy = y - (1 if mo <= 2 else 0)
    era = yy // 400
    yoe = yy - 400 * era
    doy = (153 * (mo + (-3 if mo > 2 else 9)) + 2) // 5 + d - 1
    days = 146097 * era + 365 * yoe + yoe // 4 - yoe // 100 + doy - 719468
    seconds = 86400 * days + 3600 * hh + 60 * mi + ss - 60 * offset
    w[_W_US] = 1_000_000 * seconds + frac
    return True


@leaf
def _event(buf, p, e, w):  # type: ignore[no-untyped-def]
    """Scan the payload ``buf[p:e]`` into the spans of ``w``; False when not sure."""
    if e - p > MAX_EVENT_BYTES:
        return False
    w[_W_NCTX] = 0
    p = _ws(buf, p, e)
    if p >= e or buf[p] != _LBRACE:
        return False
    p = _ws(buf, p + 1, e)
    seen = 0
    while True:
        if p >= e or buf[p] != _QUOTE:
            return False
        q = _string(buf, p + 1, e)
        if q < 0:
            return False
        if p + 9 > e:  # no event has fewer than 8 bytes after a key's opening quote
            return False
        n = q - p - 1
        u = np.uint64(p + 1)
        word = np.uint64(0)  # the key's first 8 bytes, little-endian
        for j in range(_U8):
            word |= np.uint64(buf[u + j]) << (_U8 * j)
        key = -1
        if n == 5:
            low = word & _LOW5
            key = _FIRST if low == _K_FIRST else (_SCORE if low == _K_SCORE else -1)
        elif n == 6:
            key = _SECOND if word & _LOW6 == _K_SECOND else -1
        elif n == 7:
            key = _CONTEXT if word & _LOW7 == _K_CONTEXT else -1
        elif n == 8:
            key = _MATCH_ID if word == _K_MATCH_ID else -1
        elif n == 11 and word == _K_FINISHED and buf[p + 9] == 95:  # _
            key = _FINISHED_AT if buf[p + 10] == 97 and buf[p + 11] == 116 else -1  # a t
        if key < 0 or (seen >> key) & 1:
            return False
        seen |= 1 << key
        p = _ws(buf, q + 1, e)
        if p >= e or buf[p] != _COLON:
            return False
        p = _ws(buf, p + 1, e)
        if p >= e:
            return False
        if key < _FIRST:  # match_id, finished_at
            if buf[p] != _QUOTE:
                return False
            q = _string(buf, p + 1, e)
            if q < 0:
                return False
            if key == _MATCH_ID:
                if q - p - 1 < 1 or q - p - 1 > MAX_ID_CHARS:
                    return False
                w[_W_MID] = p + 1
                w[_W_MID + 1] = q - p - 1
            else:
                if not _time(buf, p + 1, q, w):
                    return False
                w[_W_TIME] = p + 1
                w[_W_TIME + 1] = q - p - 1
            p = q + 1
        elif key < _SCORE:  # first, second
            if buf[p] != _LBRACKET:
                return False
            side = key - _FIRST
            at = _W_IDS + 2 * MAX_SIDE_SIZE * side
            k = 0
            p = _ws(buf, p + 1, e)
            while True:
                if k == MAX_SIDE_SIZE or p >= e or buf[p] != _QUOTE:
                    return False
                q = _string(buf, p + 1, e)
                if q < 0 or q - p - 1 < 1 or q - p - 1 > MAX_ID_CHARS:
                    return False
                w[at + 2 * k] = p + 1
                w[at + 2 * k + 1] = q - p - 1
                k += 1
                p = _ws(buf, q + 1, e)
                if p < e and buf[p] == _COMMA:
                    p = _ws(buf, p + 1, e)
                elif p < e and buf[p] == _RBRACKET:
                    p += 1
                    break
                else:
                    return False
            w[_W_K + side] = k
        elif key == _SCORE:
            c = buf[p]
            if c != 48 and c != 49:
                return False
            code = 2 * (c - 48)
            p += 1
            if p < e and buf[p] == 46:  # 0.0, 0.5, 1.0
                if p + 1 >= e:
                    return False
                c = buf[p + 1]
                if c == 53 and code == 0:
                    code = 1
                elif c != 48:
                    return False
                p += 2
            w[_W_SCORE] = code
        else:  # context: names to category strings
            if buf[p] != _LBRACE:
                return False
            p = _ws(buf, p + 1, e)
            k = 0
            if p < e and buf[p] == _RBRACE:
                p += 1
            else:
                while True:
                    if k == MAX_CONTEXT_FIELDS or p >= e or buf[p] != _QUOTE:
                        return False
                    q = _string(buf, p + 1, e)
                    n = q - p - 1
                    if q < 0 or n < 1 or n > MAX_NAME_CHARS:
                        return False
                    u = np.uint64(p + 1)
                    for j in range(np.uint64(n)):
                        c = buf[u + j]
                        if not (65 <= c <= 90 or 97 <= c <= 122 or c == 95) and (
                            j == 0 or not (48 <= c <= 57 or c == 46 or c == 45)
                        ):
                            return False
                    at = _W_CTX + 4 * k
                    w[at] = p + 1
                    w[at + 1] = n
                    p = _ws(buf, q + 1, e)
                    if p >= e or buf[p] != _COLON:
                        return False
                    p = _ws(buf, p + 1, e)
                    if p >= e or buf[p] != _QUOTE:
                        return False
                    q = _string(buf, p + 1, e)
                    if q < 0 or q - p - 1 < 1 or q - p - 1 > MAX_CATEGORY_CHARS:
                        return False
                    w[at + 2] = p + 1
                    w[at + 3] = q - p - 1
                    k += 1
                    p = _ws(buf, q + 1, e)
                    if p < e and buf[p] == _COMMA:
                        p = _ws(buf, p + 1, e)
                    elif p < e and buf[p] == _RBRACE:
                        p += 1
                        break
                    else:
                        return False
            w[_W_NCTX] = k
        p = _ws(buf, p, e)
        if p >= e:
            return False
        if buf[p] == _COMMA:
            p = _ws(buf, p + 1, e)
        elif buf[p] == _RBRACE:
            break
        else:
            return False
    if _ws(buf, p + 1, e) != e or seen & _REQUIRED != _REQUIRED:
        return False
    w[_W_GIVEN] = (seen >> _CONTEXT) & 1
    # No id twice in the match (on one side or on both).
    k1, k2 = w[_W_K], w[_W_K + 1]
    for a in range(k1 + k2):
        ia = _W_IDS + 2 * (a if a < k1 else MAX_SIDE_SIZE + a - k1)
        for b in range(a):
            ib = _W_IDS + 2 * (b if b < k1 else MAX_SIDE_SIZE + b - k1)
            if _compare(buf, w[ia], w[ia + 1], w[ib], w[ib + 1]) == 0:
                return False
    # Context fields in name order (insertion sort); an equal name is a repeat.
    for a in range(w[_W_NCTX]):
        ia = _W_CTX + 4 * a
        b = a
        while b > 0:
            ib = _W_CTX + 4 * w[_W_ORDER + b - 1]
            order = _compare(buf, w[ib], w[ib + 1], w[ia], w[ia + 1])
            if order == 0:
                return False
            if order < 0:
                break
            w[_W_ORDER + b] = w[_W_ORDER + b - 1]
            b -= 1
        w[_W_ORDER + b] = a
    return True


@leaf
def _put(out, o, buf, s, n):  # type: ignore[no-untyped-def]
    """Copy ``buf[s:s + n]`` to ``out[o:]``; the index after the copy."""
    to, at = np.uint64(o), np.uint64(s)  # unsigned: no negative-index wraparound
    for k in range(np.uint64(n)):
        out[to + k] = buf[at + k]
    return o + n


@leaf
def _scan(buf, lengths, sure, numbers, sizes, digests, text, canon, w, h, m):  # type: ignore[no-untyped-def]
    """Scan the payloads laid end to end in ``buf`` (``lengths`` bytes each): mark the
    sure ones in ``sure``; in order, their times and scores in ``numbers``, side sizes
    in ``sizes``, digests in ``digests``, texts (each ended by a newline) in ``text``.
    How many are sure, and the length of their texts. The rest is scratch: allocated
    by the caller, which keeps numba's runtime (and its compile time) out of it."""
    # Typed int64 rather than literal 0: a literal argument would compile the helpers
    # once more for it (numba specialises on literals).
    count = o = end = zero = np.int64(0)
    for i in range(lengths.shape[0]):
        start = end
        end += lengths[i]
        if not _event(buf, start, end, w):
            continue
        k1, k2, nctx = w[_W_K], w[_W_K + 1], w[_W_NCTX]
        # The canonical text of event_digests: match id, time, sides, score, context.
        c = _put(canon, zero, buf, w[_W_MID], w[_W_MID + 1])
        canon[c] = 0x1E
        c += 1
        whole = w[_W_US] // 1_000_000  # t = whole.fraction; repr(t) spells the same digits
        digits = 1
        power = 10
        while power <= whole:
            digits += 1
            power *= 10
        x = np.uint64(whole)  # unsigned division by 10 is cheaper
        for k in range(c + digits - 1, c - 1, -1):
            canon[k] = _ZERO + x % _U10
            x //= _U10
        c += digits
        canon[c] = 46
        c += 1
        if w[_W_FRAC + 1] == 0:
            canon[c] = 48
            c += 1
        else:
            c = _put(canon, c, buf, w[_W_FRAC], w[_W_FRAC + 1])
        for j in range(k1 + k2):
            canon[c] = 0x1E if j == 0 or j == k1 else 0x1F
            at = _W_IDS + 2 * (j if j < k1 else MAX_SIDE_SIZE + j - k1)
            c = _put(canon, c + 1, buf, w[at], w[at + 1])
        canon[c] = 0x1E
        canon[c + 1] = 48 if w[_W_SCORE] < 2 else 49  # 0.0, 0.5, 1.0
        canon[c + 2] = 46
        canon[c + 3] = 53 if w[_W_SCORE] == 1 else 48
        c += 4
        for j in range(nctx):
            canon[c] = 0x1E if j == 0 else 0x1F
            at = _W_CTX + 4 * w[_W_ORDER + j]
            c = _put(canon, c + 1, buf, w[at], w[at + 1])
            canon[c] = 0x1D
            canon[c + 1] = 115  # s
            c = _put(canon, c + 2, buf, w[at + 2], w[at + 3])
        _blake2b(canon, zero, c, zero + 8, h, m, digests, 8 * count)
        # The texts: match id, ids, finished_at, context key; each ends with a newline.
        o = _put(text, o, buf, w[_W_MID], w[_W_MID + 1])
        text[o] = 10
        o += 1
        for j in range(k1 + k2):
            at = _W_IDS + 2 * (j if j < k1 else MAX_SIDE_SIZE + j - k1)
            o = _put(text, o, buf, w[at], w[at + 1])
            text[o] = 10
            o += 1
        o = _put(text, o, buf, w[_W_TIME], w[_W_TIME + 1])
        text[o] = 10
        o += 1
        for j in range(nctx):  # the context key: fields in the payload's order
            if j:
                text[o] = 0x1F
                o += 1
            at = _W_CTX + 4 * j
            o = _put(text, o, buf, w[at], w[at + 1])
            text[o] = 0x1D
            text[o + 1] = 115  # s
            o = _put(text, o + 2, buf, w[at + 2], w[at + 3])
        text[o] = 10
        o += 1
        sure[i] = True
        numbers[0, count] = w[_W_US] / 1e6
        numbers[1, count] = 0.5 * w[_W_SCORE]
        sizes[0, count] = k1
        sizes[1, count] = k2
        sizes[2, count] = w[_W_GIVEN]
        count += 1
    return count, o


def scan_payloads(raws: Sequence[bytes]) -> Scanned:
    """The events of the payloads the compiled pass is sure of (see the module doc);
    the others (``~sure``) are for :func:`streamrate.decode.decode_events`."""
    n = len(raws)
    lengths = np.fromiter(map(len, raws), dtype=np.int64, count=n)
    joined = b"".join(raws)
    sure = np.zeros(n, dtype=np.bool_)
    numbers = np.empty((2, n))
    sizes = np.empty((3, n), dtype=np.int64)
    digests = np.empty(8 * n, dtype=np.uint8)
    text = np.empty(len(joined) + 8 * n + 8, dtype=np.uint8)  # no sure text outgrows its payload
    count, used = _scan(
        np.frombuffer(joined, dtype=np.uint8), lengths, sure, numbers, sizes, digests, text,
        np.empty(_CANON, dtype=np.uint8), np.zeros(_W_SIZE, dtype=np.int64),
        np.empty(8, dtype=np.uint64), np.empty(16, dtype=np.uint64),
    )  # fmt: skip
    at = np.flatnonzero(sure)
    times, scores = numbers[0, :count], numbers[1, :count]
    if count == 0:
        return Scanned(sure, at, [], [], [], scores, times, [], [], [], [])
    texts = str(text.data[: used - 1], "ascii").split("\n")
    sizes = sizes[:, :count]
    given = sizes[2].astype(np.bool_).tolist()
    if sizes[:2].max() == 1:  # 1 against 1: five texts per event
        match_ids = texts[0::5]
        firsts: list[tuple[str, ...]] = list(zip(texts[1::5]))
        seconds: list[tuple[str, ...]] = list(zip(texts[2::5]))
        finished = texts[3::5]
        keys = texts[4::5]
    else:
        width = sizes[0] + sizes[1] + 3
        begin = np.cumsum(width) - width
        get = texts.__getitem__
        a = begin + 1
        b = a + sizes[0]
        c = b + sizes[1]
        match_ids = list(map(get, begin.tolist()))
        firsts = list(map(tuple, map(get, map(slice, a.tolist(), b.tolist()))))
        seconds = list(map(tuple, map(get, map(slice, b.tolist(), c.tolist()))))
        finished = list(map(get, c.tolist()))
        keys = list(map(get, (c + 1).tolist()))
    return Scanned(
        sure=sure,
        at=at,
        match_ids=match_ids,
        firsts=firsts,
        seconds=seconds,
        scores=scores,
        times=times,
        finished=finished,
        context_keys=keys,
        digests=digests[: 8 * count].view("V8").tolist(),
        has_context=given,
    )


@lru_cache(maxsize=4096)
def _context_fields(key: str) -> tuple[tuple[str, str], ...]:
    fields = []
    for field in key.split("\x1f") if key else ():
        name, _, value = field.partition("\x1d")
        fields.append((name, value[1:]))  # value is "s" + the category
    return tuple(fields)


def context_of(key: str) -> dict[str, str]:
    """The context back from its key (in the payload's order); a new dict each call,
    the parse of a key cached (contexts repeat from match to match)."""
    return dict(_context_fields(key))


def context_items(key: str) -> tuple[tuple[str, str], ...]:
    """The ``(name, value)`` pairs of a context key, in the payload's order (cached)."""
    return _context_fields(key)


def _blake2b_of(data: bytes, size: int = 8) -> bytes:
    """The compiled BLAKE2b (unkeyed, ``size`` bytes) of ``data``: for tests."""
    out = np.zeros(size, dtype=np.uint8)
    h = np.empty(8, dtype=np.uint64)
    m = np.empty(16, dtype=np.uint64)
    _blake2b(np.frombuffer(data, dtype=np.uint8), 0, len(data), size, h, m, out, 0)
    return out.tobytes()


_WARM = (
    b'{"match_id": "warm-up", "finished_at": "2026-03-01T18:00:00Z", "first": ["warm-a"],'
    b' "second": ["warm-b"], "score": 1, "context": {"warm": "up"}}'
)


def warm_up() -> None:
    """Compile the scan (or load it from the disk cache) before the first batch: a
    writer or replica calls this while it starts, so the first batch does not wait
    seconds for a compile on a machine whose cache is empty."""
    scan_payloads([_WARM])
