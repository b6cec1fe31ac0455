"""Searches over the polyglot sample repository name the right unit in every language.

Uses the real packaged model (marker ``model``). The queries are written the
way a newcomer would ask, without the unit's own words where possible; the
expected units are invented demo code in ``sample_repo/`` (known by construction).
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest

from codeseek import open_index
from codeseek.api import Index

pytestmark = pytest.mark.model

SAMPLE_REPO = Path(__file__).resolve().parent.parent / "sample_repo"

CASES = [
    ("decode the bytes a dock sends over the radio into a telemetry report",
     "go/dockd/packet.go", "DecodeStatusPacket", "go"),
    ("predict how many hours until a dock's backup battery is empty",
     "ts/ops-dashboard/dockHealth.ts", "BatteryForecast.hoursUntilFlat", "typescript"),
    ("component that renders a station on the map with its worst dock status",
     "ts/ops-dashboard/StationCard.tsx", "StationCard", "tsx"),
    ("work out which docks a technician should visit first",
     "ts/ops-dashboard/dockHealth.ts", "technicianRound", "typescript"),
    ("round a price in cents to a multiple of five",
     "rust/fares/src/lib.rs", "round_to_nickel", "rust"),
    ("show elapsed seconds as a short hours and minutes label",
     "js/rider-app/tripHelpers.js", "formatDuration", "javascript"),
]


@pytest.fixture(scope="module")
def sample_index(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Index]:
    repo = tmp_path_factory.mktemp("polyglot") / "repo"
    shutil.copytree(SAMPLE_REPO, repo)
    index = open_index(repo, create=True)
    index.update()
    yield index
    index.close()


@pytest.mark.parametrize(("query", "path", "qualname", "language"), CASES,
                         ids=[case[3] + ": " + case[2] for case in CASES])
def test_query_finds_the_unit_in_its_language(sample_index: Index, query: str, path: str,
                                              qualname: str, language: str) -> None:
    hits = sample_index.search(query, 3)
    found = [(h.path, h.qualname, h.language) for h in hits]
    assert (path, qualname, language) in found, found
