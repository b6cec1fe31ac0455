"""Trip fare calculation for single rides paid per minute."""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timedelta
from decimal import ROUND_HALF_UP, Decimal
from typing import Optional

PEAK_WINDOWS = ((7, 10), (16, 19))  # local hours, weekdays only


@dataclass(frozen=True)
class FareTable:
    """Prices in cents for one class of bike (standard or electric)."""

    unlock_cents: int = 100
    per_minute_cents: int = 15
    included_minutes: int = 0
    overtime_per_minute_cents: int = 30
    overtime_after_minutes: int = 45
    peak_multiplier: float = 1.25


STANDARD = FareTable()
ELECTRIC = FareTable(unlock_cents=150, per_minute_cents=30)


def round_fare_to_nickel(cents: float) -> int:
    """Round a fare in cents to the nearest multiple of five cents, halves rounding up."""
    nickels = Decimal(str(cents)) / Decimal(5)
    return int(nickels.quantize(Decimal(1), rounding=ROUND_HALF_UP)) * 5


def billable_minutes(started: datetime, ended: datetime) -> int:
    """Length of a trip in whole minutes, counting any started minute as a full one."""
    if ended < started:
        raise ValueError("trip ends before it starts")
    return max(1, math.ceil((ended - started) / timedelta(minutes=1)))


def is_peak_hour(moment: datetime) -> bool:
    """Tell whether a moment falls inside the weekday morning or evening busy windows."""
    if moment.weekday() >= 5:
        return False
    return any(start <= moment.hour < end for start, end in PEAK_WINDOWS)


def apply_peak_multiplier(cents: int, started: datetime, table: FareTable = STANDARD) -> int:
    """Increase the price of a ride that began during rush hour by the peak surcharge factor.

    Off-peak and weekend rides are returned unchanged.
    """
    if not is_peak_hour(started):
        return cents
    return round_fare_to_nickel(cents * table.peak_multiplier)


def overtime_charge(minutes: int, table: FareTable = STANDARD) -> int:
    """Extra cents owed for the minutes a bike was kept past the overtime threshold."""
    extra = max(0, minutes - table.overtime_after_minutes)
    return extra * table.overtime_per_minute_cents


def trip_fare(started: datetime, ended: datetime, table: FareTable = STANDARD) -> int:
    """Work out the total price in cents of a single pay-as-you-go ride."""
    minutes = billable_minutes(started, ended)
    charged_minutes = max(0, minutes - table.included_minutes)
    base = table.unlock_cents + charged_minutes * table.per_minute_cents
    base += overtime_charge(minutes, table)
    return apply_peak_multiplier(round_fare_to_nickel(base), started, table)


class FareCalculator:
    """Prices trips for the billing service, choosing the right table per bike type."""

    def __init__(self, standard: FareTable = STANDARD, electric: FareTable = ELECTRIC):
        """Register the price tables for standard and electric bikes."""
        self._tables = {"standard": standard, "electric": electric}

    def table_for(self, bike_type: str) -> FareTable:
        try:
            return self._tables[bike_type]
        except KeyError:
            raise ValueError(f"unknown bike type {bike_type!r}") from None

    def price_trip(self, bike_type: str, started: datetime, ended: datetime, pass_minutes: Optional[int] = None) -> int:
        """Price one trip, letting pass holders ride their free minutes before per-minute billing starts."""
        table = self.table_for(bike_type)
        if pass_minutes is not None:
            table = FareTable(
                unlock_cents=0,
                per_minute_cents=table.per_minute_cents,
                included_minutes=pass_minutes,
                overtime_per_minute_cents=table.overtime_per_minute_cents,
                overtime_after_minutes=table.overtime_after_minutes,
                peak_multiplier=1.0,
            )
        return trip_fare(started, ended, table)

    @staticmethod
    def format_cents(cents: int) -> str:
        """Render an amount in cents as a price string for receipts."""
        return f"{cents // 100}.{cents % 100:02d} crowns"
