'use strict';

/**
 * Helpers shared by the Kestrune Cycleshare rider app and the operations
 * dashboard: station lookup, trip timers and fare previews.
 */

const EARTH_RADIUS_M = 6371000;
const OVERTIME_AFTER_MIN = 45;

/**
 * Straight-line distance in metres between two points given as {lat, lon}.
 * @param {{lat: number, lon: number}} a
 * @param {{lat: number, lon: number}} b
 * @returns {number}
 */
function distanceMeters(a, b) {
  const toRad = (deg) => (deg * Math.PI) / 180;
  const dLat = toRad(b.lat - a.lat);
  const dLon = toRad(b.lon - a.lon);
  const h =
    Math.sin(dLat / 2) ** 2 +
    Math.cos(toRad(a.lat)) * Math.cos(toRad(b.lat)) * Math.sin(dLon / 2) ** 2;
  return 2 * EARTH_RADIUS_M * Math.asin(Math.sqrt(h));
}

/**
 * Show the rider the closest station that still has bikes ready to rent,
 * skipping stations that are offline or have only faulty bikes.
 * @param {{lat: number, lon: number}} here - the rider's current position
 * @param {Array<{id: string, lat: number, lon: number, bikesAvailable: number, online: boolean}>} stations
 * @returns {{station: object, meters: number} | null}
 */
function findNearestAvailableDock(here, stations) {
  let best = null;
  for (const station of stations) {
    if (!station.online || station.bikesAvailable < 1) continue;
    const meters = distanceMeters(here, station);
    if (best === null || meters < best.meters) {
      best = { station, meters };
    }
  }
  return best;
}

/**
 * Turn a number of seconds into a short "1h 05m" or "7m 30s" label.
 * @param {number} seconds
 * @returns {string}
 */
function formatDuration(seconds) {
  const s = Math.max(0, Math.floor(seconds));
  const h = Math.floor(s / 3600);
  const m = Math.floor((s % 3600) / 60);
  if (h > 0) return `${h}h ${String(m).padStart(2, '0')}m`;
  return `${m}m ${String(s % 60).padStart(2, '0')}s`;
}

/**
 * Number of minutes the rider can keep the bike before the overtime rate applies.
 * @param {number} elapsedMinutes
 * @returns {number}
 */
const minutesUntilOvertime = (elapsedMinutes) =>
  Math.max(0, OVERTIME_AFTER_MIN - Math.floor(elapsedMinutes));

const isStale = (station, nowMs, timeoutMs = 180000) => nowMs - station.lastHeartbeatMs > timeoutMs;

/**
 * Preview the price of the ride so far, in cents, as shown on the unlock screen.
 * Mirrors the server-side fare rules but is only an estimate.
 * @param {number} minutes
 * @param {{unlockCents: number, perMinuteCents: number}} prices
 * @returns {number}
 */
function estimateFareCents(minutes, prices) {
  const raw = prices.unlockCents + Math.ceil(minutes) * prices.perMinuteCents;
  return Math.round(raw / 5) * 5;
}

/**
 * Live timer for the active trip shown in the rider app.
 */
class TripTimer {
  /**
   * @param {() => number} [clock] - returns the current time in milliseconds
   */
  constructor(clock = Date.now) {
    this.clock = clock;
    this.startedAt = null;
    this.stoppedAt = null;
    this.listeners = [];
  }

  /** Begin timing when the bike is released from the dock. */
  start() {
    this.startedAt = this.clock();
    this.stoppedAt = null;
  }

  /** Stop timing when the bike is returned and locked. */
  stop() {
    if (this.startedAt === null) throw new Error('trip was never started');
    this.stoppedAt = this.clock();
    this.listeners.forEach((fn) => fn(this.elapsedSeconds()));
  }

  /**
   * Seconds elapsed since the trip began, frozen once it has stopped.
   * @returns {number}
   */
  elapsedSeconds() {
    if (this.startedAt === null) return 0;
    const end = this.stoppedAt ?? this.clock();
    return (end - this.startedAt) / 1000;
  }

  /**
   * Register a callback that receives the trip length in seconds when the trip ends.
   * @param {(seconds: number) => void} listener
   */
  onFinish(listener) {
    this.listeners.push(listener);
  }
}

/**
 * Summarise dock availability for the dashboard map legend.
 * @param {Array<{bikesAvailable: number, docksFree: number, online: boolean}>} stations
 * @returns {{empty: number, full: number, offline: number, ok: number}}
 */
function availabilityCounts(stations) {
  const counts = { empty: 0, full: 0, offline: 0, ok: 0 };
  for (const s of stations) {
    if (!s.online) counts.offline += 1;
    else if (s.bikesAvailable === 0) counts.empty += 1;
    else if (s.docksFree === 0) counts.full += 1;
    else counts.ok += 1;
  }
  return counts;
}

module.exports = {
  distanceMeters,
  findNearestAvailableDock,
  formatDuration,
  minutesUntilOvertime,
  isStale,
  estimateFareCents,
  TripTimer,
  availabilityCounts,
};
