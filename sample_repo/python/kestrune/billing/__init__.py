"""Rider billing: trip fares, passes, invoices, refunds and card payments."""

from .fares import FareCalculator, FareTable
from .passes import MonthlyPass
from .payments import PaymentService

__all__ = ["FareCalculator", "FareTable", "MonthlyPass", "PaymentService"]
