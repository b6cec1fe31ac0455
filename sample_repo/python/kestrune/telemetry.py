"""Dock telemetry: decoding status packets sent by docks and tracking their health.

Every dock in Brindlemoor sends a 12-byte status packet over the radio mesh:

    offset  size  field
    0       1     magic byte 0xB7
    1       1     protocol version
    2       2     dock id (big endian)
    4       1     flag bits (bike present, locked, fault, on backup power)
    5       2     backup battery voltage in millivolts (big endian)
    7       4     unix timestamp in seconds (big endian)
    11      1     XOR of bytes 0..10
"""

from __future__ import annotations

import logging
import struct
import time
from dataclasses import dataclass
from typing import Dict, Iterable, List, Optional

log = logging.getLogger(__name__)

PACKET_MAGIC = 0xB7
PACKET_LEN = 12
FLAG_BIKE_PRESENT = 0x01
FLAG_LOCKED = 0x02
FLAG_FAULT = 0x04
FLAG_BACKUP_POWER = 0x08

# Lead-acid backup cell: empty at 11.6 V, full at 12.8 V.
CELL_EMPTY_MV = 11600
CELL_FULL_MV = 12800


class PacketError(ValueError):
    """Raised when a dock status packet is truncated, corrupted or of an unknown version."""


@dataclass(frozen=True)
class DockStatus:
    """One decoded status report from a single dock."""

    dock_id: int
    version: int
    bike_present: bool
    locked: bool
    fault: bool
    on_backup_power: bool
    battery_mv: int
    sent_at: int

    @property
    def needs_attention(self) -> bool:
        """A dock needs a visit when it reports a fault or holds a bike it failed to lock."""
        return self.fault or (self.bike_present and not self.locked)


def decode_status_packet(raw: bytes) -> DockStatus:
    """Decode the raw bytes of a dock status packet into a DockStatus record.

    Checks the length, the magic byte and the trailing XOR checksum before
    unpacking the fields.
    """
    if len(raw) != PACKET_LEN:
        raise PacketError(f"expected {PACKET_LEN} bytes, got {len(raw)}")
    if raw[0] != PACKET_MAGIC:
        raise PacketError(f"bad magic byte 0x{raw[0]:02x}")
    checksum = 0
    for b in raw[:-1]:
        checksum ^= b
    if checksum != raw[-1]:
        raise PacketError("checksum mismatch")
    _, version, dock_id, flags, battery_mv, sent_at = struct.unpack(">BBHBHI", raw[:-1])
    if version not in (2, 3):
        raise PacketError(f"unsupported protocol version {version}")
    return DockStatus(
        dock_id=dock_id,
        version=version,
        bike_present=bool(flags & FLAG_BIKE_PRESENT),
        locked=bool(flags & FLAG_LOCKED),
        fault=bool(flags & FLAG_FAULT),
        on_backup_power=bool(flags & FLAG_BACKUP_POWER),
        battery_mv=battery_mv,
        sent_at=sent_at,
    )


def decode_many(frames: Iterable[bytes]) -> List[DockStatus]:
    """Decode a sequence of packets, logging and skipping the ones that are malformed."""
    decoded = []
    for frame in frames:
        try:
            decoded.append(decode_status_packet(frame))
        except PacketError as exc:
            log.debug("dropping frame %r: %s", frame[:4], exc)
    return decoded


def voltage_to_charge_percent(millivolts: int) -> float:
    """Convert a backup battery reading in millivolts into an estimated percentage of charge left.

    The backup cell discharges roughly linearly between its empty and full
    voltages, so the result is clamped to the range 0-100.
    """
    span = CELL_FULL_MV - CELL_EMPTY_MV
    percent = (millivolts - CELL_EMPTY_MV) * 100.0 / span
    return max(0.0, min(100.0, round(percent, 1)))


def smooth_voltage(readings: List[int], alpha: float = 0.3) -> Optional[float]:
    """Apply an exponential moving average to noisy voltage samples from one dock."""
    if not readings:
        return None
    value = float(readings[0])
    for sample in readings[1:]:
        value = alpha * sample + (1 - alpha) * value
    return value


class HeartbeatMonitor:
    """Remembers when each dock last reported and notices docks that went quiet."""

    def __init__(self, timeout_s: int = 180, clock=time.time):
        """Create a monitor that considers a dock silent after ``timeout_s`` seconds."""
        self.timeout_s = timeout_s
        self._clock = clock
        self._last_seen: Dict[int, float] = {}

    def record(self, status: DockStatus) -> None:
        """Note that a packet from this dock was just received."""
        self._last_seen[status.dock_id] = self._clock()

    def forget(self, dock_id: int) -> None:
        self._last_seen.pop(dock_id, None)

    def stale_docks(self) -> List[int]:
        """List the docks that have not sent any heartbeat for longer than the timeout.

        These stations have gone silent, usually because of a radio or power
        problem, and are shown as offline on the operations map.
        """
        now = self._clock()
        return sorted(
            dock_id
            for dock_id, seen in self._last_seen.items()
            if now - seen > self.timeout_s
        )

    def seconds_since(self, dock_id: int) -> Optional[float]:
        """Return how many seconds ago a dock last checked in, or None if it never did."""
        seen = self._last_seen.get(dock_id)
        return None if seen is None else self._clock() - seen
