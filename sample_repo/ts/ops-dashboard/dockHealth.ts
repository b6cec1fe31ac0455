/**
 * Dock health rules behind the Kestrune Cycleshare operations dashboard:
 * which docks need a technician, and how long their backup cells will last.
 */

const SILENT_AFTER_SECONDS = 15 * 60;
const LOW_BATTERY_MV = 3400;

/** The latest status report of one dock, as the dashboard API returns it. */
export interface DockReading {
  dockId: number;
  stationId: number;
  batteryMillivolts: number;
  onBackupPower: boolean;
  fault: boolean;
  /** Unix time, in seconds, at which the dock sent this report. */
  sentAt: number;
  /** A short label for the map tooltip, such as "BM-0042 dock 3". */
  label(): string;
}

/** The badge a dock gets on the operations map. */
export enum DockHealth {
  Healthy = "healthy",
  LowBattery = "low-battery",
  Silent = "silent",
  Faulty = "faulty",
}

/**
 * Classify a dock for the map: silent when no report arrived in the last fifteen
 * minutes, faulty when it reports a fault, low battery when its backup cell reads
 * under 3.4 V while the dock runs on it.
 * @param reading - the dock's latest status report
 * @param nowSeconds - the current unix time in seconds
 * @returns the health badge shown on the map
 */
export function classifyDock(reading: DockReading, nowSeconds: number): DockHealth {
  if (nowSeconds - reading.sentAt > SILENT_AFTER_SECONDS) return DockHealth.Silent;
  if (reading.fault) return DockHealth.Faulty;
  if (reading.onBackupPower && reading.batteryMillivolts < LOW_BATTERY_MV) {
    return DockHealth.LowBattery;
  }
  return DockHealth.Healthy;
}

/**
 * Turn a station code typed into the dashboard search box ("BM-0042") or a
 * plain number into the numeric station id.
 * @throws RangeError when the code is not a Brindlemoor station code
 */
export function parseStationCode(code: string): number;
export function parseStationCode(id: number): number;
export function parseStationCode(value: string | number): number {
  if (typeof value === "number") return value;
  const match = /^BM-(\d{4})$/.exec(value.trim().toUpperCase());
  if (match === null) throw new RangeError(`not a station code: ${value}`);
  return Number(match[1]);
}

/**
 * Keeps the recent backup-cell readings of every dock and predicts when each
 * cell will run flat, so a technician can swap it before the dock goes dark.
 */
export class BatteryForecast {
  private readings = new Map<number, Array<[number, number]>>();

  constructor(private readonly window = 12) {}

  /** Remember one reading (millivolts) taken at a unix time in seconds. */
  record(dockId: number, takenAt: number, millivolts: number): void {
    const series = this.readings.get(dockId) ?? [];
    series.push([takenAt, millivolts]);
    this.readings.set(dockId, series.slice(-this.window));
  }

  /**
   * Estimate the hours left before the dock's backup cell drops below the cut-off
   * voltage, from a straight line fitted through its recent readings; null while
   * the cell is not draining or there are fewer than three readings.
   */
  hoursUntilFlat(dockId: number, cutoffMillivolts = 3300): number | null {
    const series = this.readings.get(dockId) ?? [];
    if (series.length < 3) return null;
    const n = series.length;
    const meanT = series.reduce((sum, [t]) => sum + t, 0) / n;
    const meanV = series.reduce((sum, [, v]) => sum + v, 0) / n;
    let num = 0;
    let den = 0;
    for (const [t, v] of series) {
      num += (t - meanT) * (v - meanV);
      den += (t - meanT) ** 2;
    }
    const slope = den === 0 ? 0 : num / den;
    if (slope >= 0) return null;
    const lastV = series[n - 1][1];
    const secondsLeft = (cutoffMillivolts - lastV) / slope;
    return Math.max(0, secondsLeft / 3600);
  }
}

/**
 * Order docks for a technician's round: faulty docks first, then silent ones,
 * then low batteries, each group by station so the van stops once per station.
 */
export const technicianRound = (readings: DockReading[], nowSeconds: number): DockReading[] => {
  const rank: Record<DockHealth, number> = {
    [DockHealth.Faulty]: 0,
    [DockHealth.Silent]: 1,
    [DockHealth.LowBattery]: 2,
    [DockHealth.Healthy]: 3,
  };
  return readings
    .filter((r) => classifyDock(r, nowSeconds) !== DockHealth.Healthy)
    .sort((a, b) =>
      rank[classifyDock(a, nowSeconds)] - rank[classifyDock(b, nowSeconds)] ||
      a.stationId - b.stationId);
};
