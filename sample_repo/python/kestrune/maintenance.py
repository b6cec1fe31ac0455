"""Maintenance tickets for bikes and docks: opening, triage, mechanic assignment and closing."""

from __future__ import annotations

import itertools
import logging
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from enum import IntEnum
from typing import Dict, List, Optional

from .ratelimit import log_calls

log = logging.getLogger(__name__)

SAFETY_WORDS = ("brake", "fork", "frame crack", "handlebar loose", "wheel wobble")
DOCK_WORDS = ("won't lock", "lock stuck", "screen", "no power")


class Priority(IntEnum):
    CRITICAL = 1
    HIGH = 2
    NORMAL = 3
    LOW = 4


SLA_HOURS = {Priority.CRITICAL: 4, Priority.HIGH: 24, Priority.NORMAL: 72, Priority.LOW: 168}


@dataclass
class Mechanic:
    """A workshop technician with the skills they hold and the depot they work from."""

    mechanic_id: str
    name: str
    depot: str
    skills: tuple = ("bike",)
    on_shift: bool = True


@dataclass
class Ticket:
    """A report that a bike or dock is faulty, tracked until it is repaired."""

    ticket_id: int
    asset_id: str
    asset_kind: str
    description: str
    opened_at: datetime
    priority: Priority = Priority.NORMAL
    assignee: Optional[str] = None
    closed_at: Optional[datetime] = None
    resolution: str = ""
    notes: List[str] = field(default_factory=list)

    @property
    def is_open(self) -> bool:
        """True until the ticket has been closed."""
        return self.closed_at is None


def triage_priority(description: str, asset_kind: str, reports_last_week: int = 0) -> Priority:
    """Decide how urgently a reported fault needs attention, from the rider's description.

    Anything that makes a bike unsafe to ride is critical; docks that cannot
    lock bikes are high; repeat complaints about the same asset are bumped up
    one level.
    """
    text = description.lower()
    if asset_kind == "bike" and any(word in text for word in SAFETY_WORDS):
        return Priority.CRITICAL
    if asset_kind == "dock" and any(word in text for word in DOCK_WORDS):
        level = Priority.HIGH
    elif "flat" in text or "chain" in text:
        level = Priority.NORMAL
    else:
        level = Priority.LOW
    if reports_last_week >= 3 and level > Priority.CRITICAL:
        level = Priority(level - 1)
    return level


def sla_deadline(ticket: Ticket) -> datetime:
    """Due date by which a ticket must be resolved, based on its priority level."""
    return ticket.opened_at + timedelta(hours=SLA_HOURS[ticket.priority])


class TicketDesk:
    """In-memory ticket register used by the workshop dashboard."""

    def __init__(self, mechanics: List[Mechanic], now=datetime.utcnow):
        """Start an empty register staffed by the given mechanics."""
        self._mechanics = {m.mechanic_id: m for m in mechanics}
        self._tickets: Dict[int, Ticket] = {}
        self._ids = itertools.count(1001)
        self._now = now

    def open_ticket(self, asset_id: str, asset_kind: str, description: str) -> Ticket:
        """Record a new fault report for a bike or dock and give it a priority."""
        recent = sum(
            1
            for t in self._tickets.values()
            if t.asset_id == asset_id and self._now() - t.opened_at < timedelta(days=7)
        )
        ticket = Ticket(
            ticket_id=next(self._ids),
            asset_id=asset_id,
            asset_kind=asset_kind,
            description=description,
            opened_at=self._now(),
            priority=triage_priority(description, asset_kind, recent),
        )
        self._tickets[ticket.ticket_id] = ticket
        log.info("opened ticket %d for %s (%s)", ticket.ticket_id, asset_id, ticket.priority.name)
        return ticket

    def open_count(self, mechanic_id: str) -> int:
        return sum(1 for t in self._tickets.values() if t.is_open and t.assignee == mechanic_id)

    @log_calls
    def assign_mechanic(self, ticket_id: int, depot: Optional[str] = None) -> Mechanic:
        """Choose which repair technician takes a job, preferring the least busy one with the right skill.

        Only technicians on shift are considered; when a depot is given,
        technicians from that depot win ties.
        """
        ticket = self._tickets[ticket_id]
        candidates = [
            m for m in self._mechanics.values() if m.on_shift and ticket.asset_kind in m.skills
        ]
        if not candidates:
            raise LookupError(f"no mechanic available for {ticket.asset_kind} tickets")
        chosen = min(candidates, key=lambda m: (self.open_count(m.mechanic_id), m.depot != depot))
        ticket.assignee = chosen.mechanic_id
        ticket.notes.append(f"assigned to {chosen.name}")
        return chosen

    def close_ticket(self, ticket_id: int, resolution: str) -> Ticket:
        """Mark a ticket as repaired and store what was done."""
        ticket = self._tickets[ticket_id]
        if not ticket.is_open:
            raise ValueError(f"ticket {ticket_id} is already closed")
        ticket.closed_at = self._now()
        ticket.resolution = resolution
        return ticket

    def reopen(self, ticket_id: int, reason: str) -> Ticket:
        ticket = self._tickets[ticket_id]
        ticket.closed_at = None
        ticket.notes.append(f"reopened: {reason}")
        return ticket

    def overdue(self) -> List[Ticket]:
        """Open tickets that have passed their service-level deadline, most urgent first."""
        now = self._now()
        late = [t for t in self._tickets.values() if t.is_open and sla_deadline(t) < now]
        return sorted(late, key=lambda t: (t.priority, t.opened_at))
