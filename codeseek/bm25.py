"""BM25 as SQLite's FTS5 computes it, with corpus statistics given from outside.

A keyword score depends on the corpus: each phrase's inverse document
frequency (from the number of rows, and of rows holding the phrase) and the
average row length. Two indexes of two halves of a repository therefore score
the same unit differently from one index of the whole. To rank several
indexes as one, each index scores its matches with the statistics of all of
them (:class:`CorpusStats`, summed over the indexes by :meth:`CorpusStats.combined`).

FTS5 gives no way to pass statistics in, so the formula is done here, exactly
as FTS5's ``bm25()`` does it (SQLite ``ext/fts5/fts5_aux.c``,
``fts5Bm25Function`` and ``fts5Bm25GetData``: k1 = 1.2, b = 0.75, a phrase's
weighted frequency is the sum of its instances' column weights, the row length
is its token count over all columns, an IDF at or below 0 becomes 1e-6), in the
same order of floating-point operations. A row's phrase frequencies are read
back from FTS5's own one-phrase scores (:func:`frequency`); with the index's
own statistics :func:`score` gives FTS5's value bit for bit
(``tests/test_multi.py`` holds it to ``bm25()`` on the standard library).

Light: the standard library only.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

K1 = 1.2
B = 0.75
COLUMN_WEIGHTS = (4.0, 2.0, 2.0, 1.0)
"""The weights of the lexical columns (names, signature, doc, code) in ``bm25()``.
Whole numbers: a phrase's weighted frequency is then a whole number, which is how
:func:`frequency` reads it back exactly."""
IDF_FLOOR = 1e-6


@dataclass(frozen=True)
class CorpusStats:
    """What BM25 needs of a corpus for one query.

    Attributes:
        rows: the rows (units) of the corpus.
        tokens: their tokens, over all columns.
        matches: for each phrase of the query, in order, how many rows hold it.
    """

    rows: int
    tokens: int
    matches: tuple[int, ...]

    @property
    def avgdl(self) -> float:
        """The average row length, as FTS5 divides it."""
        return float(self.tokens) / float(self.rows) if self.rows else 0.0

    def idf(self) -> list[float]:
        """Each phrase's inverse document frequency, as FTS5 computes it."""
        out = []
        for hits in self.matches:
            value = math.log((self.rows - hits + 0.5) / (hits + 0.5))
            out.append(value if value > 0.0 else IDF_FLOOR)
        return out

    @classmethod
    def combined(cls, parts: Iterable[CorpusStats]) -> CorpusStats:
        """The statistics of the union of several corpora (same query, so the same
        phrases)."""
        parts = list(parts)
        if not parts:
            raise ValueError("no corpus statistics to combine")
        widths = {len(part.matches) for part in parts}
        if len(widths) != 1:
            raise ValueError("corpus statistics of different queries cannot be combined")
        return cls(sum(p.rows for p in parts), sum(p.tokens for p in parts),
                   tuple(sum(column) for column in zip(*(p.matches for p in parts),
                                                       strict=True)))

    def to_json(self) -> dict[str, object]:
        """A JSON-ready dict."""
        return {"rows": self.rows, "tokens": self.tokens, "matches": list(self.matches)}

    @classmethod
    def from_json(cls, data: object) -> CorpusStats:
        """The statistics a :meth:`to_json` dict describes (ValueError if malformed)."""
        if not isinstance(data, dict):
            raise ValueError("corpus statistics must be an object")
        rows, tokens, matches = data.get("rows"), data.get("tokens"), data.get("matches")
        counts = [rows, tokens, *(matches if isinstance(matches, list) else [None])]
        if not all(isinstance(c, int) and not isinstance(c, bool) and c >= 0 for c in counts):
            raise ValueError("corpus statistics hold whole numbers: rows, tokens, matches")
        assert isinstance(rows, int) and isinstance(tokens, int) and isinstance(matches, list)
        return cls(rows, tokens, tuple(matches))


def _saturation(stats_avgdl: float, length: float) -> float:
    return K1 * (1 - B + B * length / stats_avgdl)


def score(idf: Sequence[float], avgdl: float, frequencies: Mapping[int, float],
          length: float) -> float:
    """A row's BM25 (higher is better): ``frequencies`` maps a phrase's position to its
    weighted frequency in the row (absent: 0), ``length`` is the row's token count."""
    total = 0.0
    for phrase, weight in enumerate(idf):
        f = frequencies.get(phrase, 0.0)
        total += weight * ((f * (K1 + 1.0)) / (f + _saturation(avgdl, length)))
    return total


def frequency(one_phrase_score: float, idf: float, avgdl: float, length: float) -> float:
    """A phrase's weighted frequency in a row, read back from FTS5's score of the row for
    that phrase alone (higher is better) under the same statistics: BM25 solved for the
    frequency, rounded to the whole number it is (:data:`COLUMN_WEIGHTS`)."""
    g = one_phrase_score / idf
    return float(round(g * _saturation(avgdl, length) / (K1 + 1.0 - g)))


def varints(blob: bytes) -> list[int]:
    """The SQLite varints a blob holds, in order (FTS5 keeps row and column sizes so:
    big-endian, 7 bits a byte, the high bit set on every byte but the last, the ninth
    byte whole)."""
    values: list[int] = []
    at = 0
    while at < len(blob):
        value = 0
        for position in range(9):
            if at >= len(blob):
                raise ValueError("a varint breaks off")
            byte = blob[at]
            at += 1
            if position == 8:
                value = (value << 8) | byte
                break
            value = (value << 7) | (byte & 0x7F)
            if not byte & 0x80:
                break
        values.append(value)
    return values
