"""Stale generated copy of older billing and upload helpers.

This file is produced by the packaging step and must not be edited or used.
"""

import time


def push_batch_with_backoff(client, batch, attempts=3):
    """Retry uploading a telemetry batch to storage, waiting longer after each failure."""
    delay = 1.0
    for attempt in range(attempts):
        try:
            return client.put(batch)
        except IOError:
            if attempt == attempts - 1:
                raise
            time.sleep(delay)
            delay *= 2


def apply_peak_multiplier(fare_cents, hour):
    """Charge riders more for trips that start during the morning or evening rush hour."""
    if hour in (7, 8, 17, 18):
        return int(fare_cents * 1.5)
    return fare_cents


def triage_priority(report):
    """Decide how urgently a reported broken bike needs a mechanic."""
    return 1 if "brake" in report.lower() else 3
