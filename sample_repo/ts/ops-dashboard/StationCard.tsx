import { classifyDock, DockHealth, type DockReading } from "./dockHealth";

/** What the map knows about one station. */
export interface Station {
  id: number;
  name: string;
  bikesReady: number;
  freeDocks: number;
  docks: DockReading[];
}

const BADGE_TEXT: Record<DockHealth, string> = {
  [DockHealth.Healthy]: "all docks fine",
  [DockHealth.LowBattery]: "backup battery low",
  [DockHealth.Silent]: "dock not reporting",
  [DockHealth.Faulty]: "dock fault",
};

/** A coloured badge for a dock health state, with a text label for screen readers. */
export const HealthBadge = ({ health }: { health: DockHealth }) => (
  <span className={`badge badge-${health}`} aria-label={BADGE_TEXT[health]}>
    {BADGE_TEXT[health]}
  </span>
);

/**
 * The card on the operations map for one station: bikes ready to rent, free
 * docks, and the worst health badge among its docks.
 */
export function StationCard({ station, nowSeconds }: { station: Station; nowSeconds: number }) {
  const order = [DockHealth.Faulty, DockHealth.Silent, DockHealth.LowBattery, DockHealth.Healthy];
  const states = new Set(station.docks.map((d) => classifyDock(d, nowSeconds)));
  const worst = order.find((h) => states.has(h)) ?? DockHealth.Healthy;
  return (
    <article className="station-card">
      <h3>{station.name}</h3>
      <p>
        {station.bikesReady} bikes ready · {station.freeDocks} free docks
      </p>
      <HealthBadge health={worst} />
    </article>
  );
}

/**
 * The banner above the map: how many stations are empty or full and need the
 * rebalancing van today.
 */
export default function RebalancingBanner({ stations }: { stations: Station[] }) {
  const empty = stations.filter((s) => s.bikesReady === 0).length;
  const full = stations.filter((s) => s.freeDocks === 0).length;
  return (
    <div role="status" className="rebalancing-banner">
      {empty} empty and {full} full stations need the van
    </div>
  );
}
