"""Fleet rebalancing: deciding which docks need bikes and routing the vans that move them."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Dict, List, Sequence, Tuple

from .ratelimit import log_calls

EARTH_RADIUS_KM = 6371.0
VAN_CAPACITY = 18


@dataclass
class Station:
    """A docking station with its location, number of docks and current bikes."""

    station_id: str
    lat: float
    lon: float
    capacity: int
    bikes: int
    target_fill: float = 0.5

    @property
    def free_docks(self) -> int:
        return self.capacity - self.bikes

    def imbalance(self) -> int:
        """Bikes above (positive) or below (negative) the level this station should hold."""
        return self.bikes - round(self.capacity * self.target_fill)


@dataclass
class Move:
    """An instruction for a van crew to carry bikes from one station to another."""

    source: str
    destination: str
    bikes: int


@dataclass
class DemandHistory:
    """Rentals counted per station, weekday and hour over the previous weeks."""

    counts: Dict[Tuple[str, int, int], List[int]] = field(default_factory=dict)

    def add(self, station_id: str, weekday: int, hour: int, rentals: int) -> None:
        """Store the rental count observed for one station-hour."""
        self.counts.setdefault((station_id, weekday, hour), []).append(rentals)


def haversine_km(a: Tuple[float, float], b: Tuple[float, float]) -> float:
    """Great-circle distance in kilometres between two (lat, lon) points."""
    lat1, lon1, lat2, lon2 = map(math.radians, (*a, *b))
    h = math.sin((lat2 - lat1) / 2) ** 2 + math.cos(lat1) * math.cos(lat2) * math.sin((lon2 - lon1) / 2) ** 2
    return 2 * EARTH_RADIUS_KM * math.asin(math.sqrt(h))


def forecast_hourly_demand(history: DemandHistory, station_id: str, weekday: int, hour: int) -> float:
    """Predict how many bikes riders will rent from a station during a given hour of the week.

    Uses a weighted average of the same hour on the same weekday in past
    weeks, giving recent weeks more weight than older ones.
    """
    samples = history.counts.get((station_id, weekday, hour), [])
    if not samples:
        return 0.0
    weights = [0.7 ** age for age in range(len(samples) - 1, -1, -1)]
    return sum(w * s for w, s in zip(weights, samples)) / sum(weights)


def adjust_targets_for_demand(stations: Sequence[Station], history: DemandHistory, weekday: int, hour: int) -> None:
    """Raise the fill target of busy stations so they start the hour with more bikes."""
    for station in stations:
        expected = forecast_hourly_demand(history, station.station_id, weekday, hour)
        station.target_fill = min(0.9, 0.4 + expected / max(station.capacity, 1))


@log_calls
def plan_moves(stations: Sequence[Station]) -> List[Move]:
    """Pair overfull stations with empty ones and decide how many bikes to move between them."""
    donors = sorted((s for s in stations if s.imbalance() > 0), key=lambda s: -s.imbalance())
    takers = sorted((s for s in stations if s.imbalance() < 0), key=lambda s: s.imbalance())
    surplus = {s.station_id: s.imbalance() for s in donors}
    moves: List[Move] = []
    for taker in takers:
        need = -taker.imbalance()
        for donor in donors:
            if need == 0:
                break
            give = min(surplus[donor.station_id], need, VAN_CAPACITY)
            if give > 0:
                moves.append(Move(donor.station_id, taker.station_id, give))
                surplus[donor.station_id] -= give
                need -= give
    return moves


def plan_van_route(depot: Tuple[float, float], stops: Dict[str, Tuple[float, float]]) -> List[str]:
    """Order the stations a rebalancing van should visit, starting from its depot.

    Uses a greedy nearest-neighbour tour, which is good enough for the dozen
    or so stops a van makes in one shift.
    """

    def nearest_unvisited(here: Tuple[float, float], remaining: Dict[str, Tuple[float, float]]) -> str:
        """Pick the closest station the van has not called at yet."""
        return min(remaining, key=lambda sid: haversine_km(here, remaining[sid]))

    route: List[str] = []
    remaining = dict(stops)
    here = depot
    while remaining:
        sid = nearest_unvisited(here, remaining)
        route.append(sid)
        here = remaining.pop(sid)
    return route


def route_length_km(depot: Tuple[float, float], route: List[str], stops: Dict[str, Tuple[float, float]]) -> float:
    """Total driving distance of a route, returning to the depot at the end."""
    points = [depot] + [stops[sid] for sid in route] + [depot]
    return sum(haversine_km(a, b) for a, b in zip(points, points[1:]))


class RebalancePlanner:
    """Builds a shift plan for the rebalancing crews from the current station snapshot."""

    def __init__(self, depot: Tuple[float, float], history: DemandHistory):
        """Remember where the vans start from and the demand history to plan with."""
        self.depot = depot
        self.history = history

    def plan_shift(self, stations: Sequence[Station], weekday: int, hour: int) -> Tuple[List[Move], List[str]]:
        """Work out the bike moves for the coming hour and the order the van visits stations in."""
        adjust_targets_for_demand(stations, self.history, weekday, hour)
        moves = plan_moves(stations)
        by_id = {s.station_id: (s.lat, s.lon) for s in stations}
        involved = {m.source for m in moves} | {m.destination for m in moves}
        route = plan_van_route(self.depot, {sid: by_id[sid] for sid in involved})
        return moves, route

    def summary(self, moves: List[Move]) -> str:
        total = sum(m.bikes for m in moves)
        return f"{len(moves)} moves, {total} bikes"
