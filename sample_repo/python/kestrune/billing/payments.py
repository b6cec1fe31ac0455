"""Card payments: taking money for rides, dunning declined cards and giving refunds."""

from __future__ import annotations

import logging
import uuid
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from enum import Enum
from typing import Dict, List, Optional, Protocol

log = logging.getLogger(__name__)

RETRY_SCHEDULE = (timedelta(hours=6), timedelta(days=1), timedelta(days=3))
MAX_REFUND_AGE = timedelta(days=60)


class ChargeState(Enum):
    PENDING = "pending"
    SUCCEEDED = "succeeded"
    DECLINED = "declined"
    ABANDONED = "abandoned"
    REFUNDED = "refunded"


class CardGateway(Protocol):
    def charge(self, card_token: str, amount_cents: int, idempotency_key: str) -> bool:
        """Ask the card processor to collect an amount; True means it was approved."""
        ...

    def refund(self, charge_id: str, amount_cents: int) -> bool:
        """Ask the card processor to send money back for an earlier charge."""
        ...


@dataclass
class Charge:
    """One attempt to collect money from a rider's saved card."""

    charge_id: str
    rider_id: str
    card_token: str
    amount_cents: int
    created_at: datetime
    state: ChargeState = ChargeState.PENDING
    attempts: int = 0
    next_retry_at: Optional[datetime] = None
    refunded_cents: int = 0
    history: List[str] = field(default_factory=list)


class RefundError(Exception):
    """The refund was refused, for example because it exceeds what was paid."""


class PaymentService:
    """Talks to the card gateway and keeps the state of every charge."""

    def __init__(self, gateway: CardGateway, now=datetime.utcnow):
        """Wrap a card gateway; ``now`` can be replaced with a fixed clock in tests."""
        self.gateway = gateway
        self._now = now
        self._charges: Dict[str, Charge] = {}

    def charge_card(self, rider_id: str, card_token: str, amount_cents: int) -> Charge:
        """Take payment from the rider's stored card and record whether it went through."""
        charge = Charge(uuid.uuid4().hex, rider_id, card_token, amount_cents, self._now())
        self._charges[charge.charge_id] = charge
        self._attempt(charge)
        return charge

    def _attempt(self, charge: Charge) -> None:
        """Run one gateway call for a charge and move it to its next state."""
        charge.attempts += 1
        ok = self.gateway.charge(charge.card_token, charge.amount_cents, f"{charge.charge_id}-{charge.attempts}")
        charge.history.append(f"{self._now().isoformat()} attempt {charge.attempts}: {'ok' if ok else 'declined'}")
        if ok:
            charge.state = ChargeState.SUCCEEDED
            charge.next_retry_at = None
        elif charge.attempts > len(RETRY_SCHEDULE):
            charge.state = ChargeState.ABANDONED
            charge.next_retry_at = None
        else:
            charge.state = ChargeState.DECLINED
            charge.next_retry_at = self._now() + RETRY_SCHEDULE[charge.attempts - 1]

    def retry_declined_charges(self) -> List[Charge]:
        """Try billing riders' cards again for payments that were previously declined.

        Each declined charge is retried on a fixed schedule (six hours, one day,
        three days); after the last try it is abandoned and the rider's account
        is locked until they update their card.
        """
        now = self._now()
        retried = []
        for charge in self._charges.values():
            if charge.state is ChargeState.DECLINED and charge.next_retry_at and charge.next_retry_at <= now:
                self._attempt(charge)
                retried.append(charge)
                if charge.state is ChargeState.ABANDONED:
                    log.warning("charge %s abandoned, locking rider %s", charge.charge_id, charge.rider_id)
        return retried

    def issue_refund(self, charge_id: str, amount_cents: Optional[int] = None, reason: str = "") -> int:
        """Give money back to a rider for a ride that went wrong, fully or in part.

        Refunds are only possible for successful charges younger than sixty
        days and never for more than was originally paid.
        """
        charge = self._charges[charge_id]
        if charge.state not in (ChargeState.SUCCEEDED, ChargeState.REFUNDED):
            raise RefundError(f"charge {charge_id} was never paid")
        if self._now() - charge.created_at > MAX_REFUND_AGE:
            raise RefundError("charge is too old to refund")
        remaining = charge.amount_cents - charge.refunded_cents
        amount = remaining if amount_cents is None else amount_cents
        if amount <= 0 or amount > remaining:
            raise RefundError(f"cannot refund {amount} of {remaining} cents")
        if not self.gateway.refund(charge_id, amount):
            raise RefundError("gateway refused the refund")
        charge.refunded_cents += amount
        charge.state = ChargeState.REFUNDED
        charge.history.append(f"{self._now().isoformat()} refunded {amount} ({reason})")
        return amount

    def outstanding_for(self, rider_id: str) -> int:
        """Sum of unpaid cents a rider still owes from declined or abandoned charges."""
        return sum(
            c.amount_cents
            for c in self._charges.values()
            if c.rider_id == rider_id and c.state in (ChargeState.DECLINED, ChargeState.ABANDONED)
        )

    def get(self, charge_id: str) -> Charge:
        return self._charges[charge_id]
