"""Agreement of a search across two repositories with one index of their union.

Copies the standard-library packages of tests/test_multi.py (real open-source code
installed on this machine) into one tree and, by alternate file, two halves; indexes
the three; prints the mean top-10 overlap of the merged answer of the halves with the
whole's answer, for each merge rule of codeseek/multi.py and two candidate counts.

    PYTHONPATH=$PWD flock /tmp/codeseek-heavy.lock .venv/bin/python scripts/bench_multi.py
    PYTHONPATH=$PWD .venv/bin/python scripts/bench_multi.py --fake   # no model, seconds
"""

from __future__ import annotations

import shutil
import sys
import sysconfig
import tempfile
from dataclasses import replace
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
from test_multi import STDLIB_PACKAGES, STDLIB_QUERIES, _top  # noqa: E402

from codeseek import FakeEmbedder, open_index  # noqa: E402
from codeseek.multi import MERGE_KINDS, merge  # noqa: E402
from codeseek.query import Query  # noqa: E402


def main() -> None:
    fake = "--fake" in sys.argv[1:]
    tmp = Path(tempfile.mkdtemp(prefix="codeseek-bench-multi-"))
    stdlib = Path(sysconfig.get_paths()["stdlib"])
    whole, halves = tmp / "whole", [tmp / "half0", tmp / "half1"]
    files = sorted(p for package in STDLIB_PACKAGES for p in (stdlib / package).rglob("*.py")
                   if "test" not in p.parts)
    for number, source in enumerate(files):
        relative = source.relative_to(stdlib)
        for target in (whole / relative, halves[number % 2] / relative):
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(source, target)
    indexes = [open_index(root, create=True, embedder=FakeEmbedder() if fake else None)
               for root in (whole, *halves)]
    try:
        for index in indexes:
            index.update()
        queries = [Query(text=text, k=10) for text in STDLIB_QUERIES]
        single = list(indexes[0].search_many(queries))
        print(f"{len(files)} files, {len(queries)} queries, "
              f"{'fake embedder' if fake else 'packaged model'}")
        for candidates in (10, 50):
            per = [list(index.search_many([replace(q, k=candidates) for q in queries]))
                   for index in indexes[1:]]
            for kind in MERGE_KINDS:
                overlaps = []
                for i in range(len(queries)):
                    merged = merge([(str(h), answers[i]) for h, answers in zip(halves, per,
                                                                                strict=True)],
                                   10, kind)
                    overlaps.append(len(_top(merged) & _top(single[i])) / 10)
                print(f"candidates {candidates:>3}  {kind:<15} mean top-10 overlap "
                      f"{sum(overlaps) / len(overlaps):.3f}")
    finally:
        for index in indexes:
            index.close()
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
