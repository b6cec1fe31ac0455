"""A repository where a query adapter must help: docs written in a rotated vocabulary.

Each of 480 functions is built from three of 40 concepts. Its code names them with
code words (``zqab``), its doc with doc words (``wdab``). The embedder gives a code
word its concept's vector and a doc word that vector turned by a hidden rotation, so
a doc's vector has nothing in common with its code's: plain dense search cannot
pair them and keyword search has no word in common to go on, while a linear map
(the inverse rotation) pairs them all. Question words of a third kind (``qxab``)
share no letters with the code but embed like code words: a question in them is
found by the plain model and lost by an adapter that turns every query.
"""

from __future__ import annotations

import json
import re
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from codeseek import FakeEmbedder

CONCEPTS = 40
UNITS = 480
PER_FILE = 40
LETTERS = "abcdefghij"  # concept j is written with two of these: no digits, no stems
_TOKEN = re.compile(r"\b(zq|wd|qx)([a-j]{2})\b")


def word(prefix: str, concept: int) -> str:
    """The word of a concept in one vocabulary: ``zq`` code, ``wd`` doc, ``qx`` question."""
    return prefix + LETTERS[concept // 10] + LETTERS[concept % 10]


class PlantedEmbedder:
    """Code and question words embed as their concept; doc words as its rotation."""

    def __init__(self, dim: int = 24, seed: int = 3) -> None:
        self.dim = dim
        self.model_id = f"planted-rotation-{dim}"
        rng = np.random.default_rng(seed)
        base = rng.normal(size=(CONCEPTS, dim))
        self.base = base / np.linalg.norm(base, axis=1, keepdims=True)
        self.rotation, _ = np.linalg.qr(rng.normal(size=(dim, dim)))
        self.fallback = FakeEmbedder(dim)  # texts with no concept word (off-topic probes)

    def encode(self, texts: Sequence[str], progress: object = None) -> np.ndarray:
        out = np.zeros((len(texts), self.dim))
        for row, text in enumerate(texts):
            for prefix, code in _TOKEN.findall(text):
                vector = self.base[LETTERS.index(code[0]) * 10 + LETTERS.index(code[1])]
                out[row] += self.rotation @ vector if prefix == "wd" else vector
            if not out[row].any():
                out[row] = self.fallback.encode([text])[0]
        if callable(progress):
            progress(len(texts))
        return (out / np.linalg.norm(out, axis=1, keepdims=True)).astype(np.float32)


def concepts_of_units(seed: int = 11) -> list[tuple[int, int, int]]:
    """Each unit's three concepts, no two units alike."""
    rng = np.random.default_rng(seed)
    chosen: list[tuple[int, int, int]] = []
    while len(chosen) < UNITS:
        a, b, c = sorted(int(x) for x in rng.choice(CONCEPTS, 3, replace=False))
        if (a, b, c) not in chosen:
            chosen.append((a, b, c))
    return chosen


def where(unit: int) -> tuple[str, str]:
    """A unit's (path, qualname)."""
    return f"pkg/part_{unit // PER_FILE:02d}.py", f"task_{unit:04d}"


def write_repo(root: Path) -> list[tuple[int, int, int]]:
    """The repository's files under ``root``; returns each unit's concepts."""
    concepts = concepts_of_units()
    (root / "pkg").mkdir(parents=True)
    for first in range(0, UNITS, PER_FILE):
        lines: list[str] = []
        for unit in range(first, first + PER_FILE):
            doc = " ".join(word("wd", c) for c in concepts[unit])
            code = " + ".join(word("zq", c) for c in concepts[unit])
            lines += [f"def {where(unit)[1]}(value):", f'    """{doc}."""',
                      f"    return {code} + value", "", ""]
        (root / where(first)[0]).write_text("\n".join(lines), encoding="utf-8")
    return concepts


def write_questions(path: Path, concepts: list[tuple[int, int, int]], prefix: str,
                    units: Sequence[int] = range(0, UNITS, 12)) -> Path:
    """A question file: each question names its unit's concepts in one vocabulary."""
    with path.open("w", encoding="utf-8") as out:
        for unit in units:
            file, qualname = where(unit)
            out.write(json.dumps({"question": " ".join(word(prefix, c) for c in concepts[unit]),
                                  "answers": [{"path": file, "qualname": qualname}]}) + "\n")
    return path
