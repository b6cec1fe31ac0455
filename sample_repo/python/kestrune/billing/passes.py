"""Monthly passes and the invoices sent to riders at the end of each billing month."""

from __future__ import annotations

import calendar
from dataclasses import dataclass, field
from datetime import date, datetime, timedelta
from typing import Iterable, List, Optional

PASS_PRICE_CENTS = 2400
PASS_FREE_MINUTES = 45
TAX_RATE = 0.08


def round_to_nearest_five_cents(amount_cents: float) -> int:
    """Round an amount of cents to the closest five-cent step."""
    return int(5 * round(amount_cents / 5.0))


@dataclass
class MonthlyPass:
    """A rider's subscription giving free rides up to a time limit for a calendar month."""

    rider_id: str
    valid_from: date
    valid_until: date
    auto_renew: bool = True
    free_minutes_per_ride: int = PASS_FREE_MINUTES

    def is_active(self, on: date) -> bool:
        """True when the pass covers the given day."""
        return self.valid_from <= on <= self.valid_until

    def renew(self) -> "MonthlyPass":
        """Create the pass for the following calendar month, keeping the same settings."""
        start = self.valid_until + timedelta(days=1)
        last_day = calendar.monthrange(start.year, start.month)[1]
        return MonthlyPass(
            rider_id=self.rider_id,
            valid_from=start,
            valid_until=start.replace(day=last_day),
            auto_renew=self.auto_renew,
            free_minutes_per_ride=self.free_minutes_per_ride,
        )

    def days_left(self, today: date) -> int:
        return max(0, (self.valid_until - today).days + 1)


def prorated_pass_price(bought_on: date, price_cents: int = PASS_PRICE_CENTS) -> int:
    """Charge only for the remaining days when a pass is bought partway through a month."""
    days_in_month = calendar.monthrange(bought_on.year, bought_on.month)[1]
    remaining = days_in_month - bought_on.day + 1
    return round_to_nearest_five_cents(price_cents * remaining / days_in_month)


@dataclass
class InvoiceLine:
    description: str
    amount_cents: int
    when: Optional[datetime] = None


@dataclass
class Invoice:
    """A rider's bill for one month: pass fee, trip charges, refunds and tax."""

    rider_id: str
    period: str
    lines: List[InvoiceLine] = field(default_factory=list)

    @property
    def subtotal_cents(self) -> int:
        return sum(line.amount_cents for line in self.lines)

    @property
    def tax_cents(self) -> int:
        """Sales tax owed on the positive part of the subtotal."""
        return round_to_nearest_five_cents(max(0, self.subtotal_cents) * TAX_RATE)

    @property
    def total_cents(self) -> int:
        """Amount the rider has to pay, tax included."""
        return self.subtotal_cents + self.tax_cents

    def render_text(self) -> str:
        """Lay out the invoice as plain text suitable for the body of an email."""
        rows = [f"Kestrune Cycleshare - statement {self.period} for rider {self.rider_id}", ""]
        for line in self.lines:
            stamp = line.when.strftime("%d %b %H:%M") if line.when else ""
            rows.append(f"{stamp:<14}{line.description:<40}{line.amount_cents / 100:>9.2f}")
        rows.append("")
        rows.append(f"{'Tax':<54}{self.tax_cents / 100:>9.2f}")
        rows.append(f"{'Total':<54}{self.total_cents / 100:>9.2f}")
        return "\n".join(rows)


def build_monthly_invoice(
    rider_id: str,
    year: int,
    month: int,
    trips: Iterable[dict],
    refunds: Iterable[dict] = (),
    active_pass: Optional[MonthlyPass] = None,
) -> Invoice:
    """Produce the end-of-month statement for one rider, listing every ride charge, refund and pass fee.

    Trips and refunds outside the month are skipped; refunds appear as
    negative lines.
    """
    invoice = Invoice(rider_id=rider_id, period=f"{year}-{month:02d}")
    if active_pass is not None and active_pass.valid_from.month == month:
        invoice.lines.append(InvoiceLine("Monthly pass", prorated_pass_price(active_pass.valid_from)))
    for trip in sorted(trips, key=lambda t: t["started"]):
        started: datetime = trip["started"]
        if (started.year, started.month) != (year, month):
            continue
        desc = f"Ride {trip['from_station']} -> {trip['to_station']}"
        invoice.lines.append(InvoiceLine(desc, trip["fare_cents"], started))
    for refund in refunds:
        invoice.lines.append(InvoiceLine(f"Refund: {refund['reason']}", -refund["amount_cents"], refund.get("when")))
    return invoice
