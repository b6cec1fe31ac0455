"""Agreement of a search across two repositories with one index of their union.

Copies standard-library packages (real open-source code installed on this machine,
the packages of tests/test_multi.py, or the whole library with --all) into one tree
and, by alternate file, two halves; indexes the three; and prints, for each merge
rule of codeseek/multi.py, how the merged answer of the halves agrees with the whole's
answer over the queries of tests/test_multi.py:

* top-1: the share of queries whose best hit is the same;
* top-10 overlap: the mean share of the whole's top 10 found in the merged top 10;
* MRR agreement: the mean reciprocal rank, in the merged top 10, of the whole's best hit
  (1.0 when the best hits always agree, 0 for a query whose best is missing).

    PYTHONPATH=$PWD flock /tmp/codeseek-heavy.lock .venv/bin/python scripts/bench_multi.py
    PYTHONPATH=$PWD .venv/bin/python scripts/bench_multi.py --fake   # no model, seconds
    ... scripts/bench_multi.py --fake --all                          # the whole library
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
from test_multi import STDLIB_QUERIES, agreement, halved_stdlib  # noqa: E402

from codeseek import FakeEmbedder, open_index  # noqa: E402
from codeseek.multi import MERGE_KINDS, MultiService  # noqa: E402
from codeseek.query import Query  # noqa: E402


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--fake", action="store_true", help="the fake embedder (no model)")
    parser.add_argument("--all", action="store_true", help="the whole standard library")
    args = parser.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="codeseek-bench-multi-"))
    try:
        whole, halves, files = halved_stdlib(tmp, everything=args.all)
        indexes = [open_index(root, create=True,
                              embedder=FakeEmbedder() if args.fake else None)
                   for root in (whole, *halves)]
        try:
            began = time.perf_counter()
            for index in indexes:
                index.update()
            built = time.perf_counter() - began
            units = [index.status().units for index in indexes]
            queries = [Query(text=text, k=10) for text in STDLIB_QUERIES]
            single = list(indexes[0].search_many(queries))
            print(f"{files} files, {units[0]} units (halves {units[1]} + {units[2]}), "
                  f"{len(queries)} queries, {'fake embedder' if args.fake else 'packaged model'}"
                  f", built in {built:.0f} s")
            multi = MultiService([(str(root), index) for root, index in zip(
                halves, indexes[1:], strict=True)])
            for kind in MERGE_KINDS:
                multi.kind = kind
                began = time.perf_counter()
                merged = list(multi.search_many(queries))
                took = (time.perf_counter() - began) / len(queries) * 1000
                top1, overlap, mrr = agreement(merged, single)
                print(f"{kind:<15} top-1 {top1:.3f}  top-10 overlap {overlap:.3f}  "
                      f"MRR agreement {mrr:.3f}  ({took:.1f} ms a query)")
            began = time.perf_counter()
            list(indexes[0].search_many(queries))
            took = (time.perf_counter() - began) / len(queries) * 1000
            print(f"{'one index':<15} ({took:.1f} ms a query, the same run)")
        finally:
            for index in indexes:
                index.close()
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
