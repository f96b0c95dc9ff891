"""What the screening flags on simulated historian data, against the simulator's truth.

Our invented five-branch block (the same as in tests/model/test_simulate.py), 60 days of
1-minute data with the simulator's default instrument noise, quantisation, NaNs (0.1 %)
and spikes (0.03 %, ±30 %), frequent pump trips, and one frozen flow meter. Prints the
flag counts per tag, then: frozen-meter recall and delay, false frozen flags elsewhere,
pump-off agreement with the true pump state, and the screening speed.

    .venv/bin/python benchmarks/screening.py [--days 60]
"""

from __future__ import annotations

import argparse
import time

import pandas as pd
import simulate_fit  # sibling script: `python benchmarks/screening.py` puts it on the path

from model import simulate as sm
from model.network import ParallelHeader, PumpCurve
from monitor.analysis.quality import FLAGS, ScreenSettings, TagLimits, screen

BAR = 1.0e5
KINDS = {
    "PT": "pressure",
    "FT": "flow",
    "TT": "temperature",
    "LT": "level",
    "ZT": "position",
    "SI": "speed",
}


def site() -> tuple[ParallelHeader, PumpCurve, sm.SiteTags]:
    """The five-branch block of the fit benchmark (one invented site for both)."""
    header, pump, tags, _logged = simulate_fit.site()
    return header, pump, tags


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, default=60)
    args = parser.parse_args()
    start = pd.Timestamp("2025-05-01", tz="UTC")
    end = start + pd.Timedelta(days=args.days)
    frozen_from, frozen_to = start + pd.Timedelta(days=20), start + pd.Timedelta(days=23)
    header, pump, tags = site()
    sim = sm.simulate(
        header,
        pump,
        tags,
        start=start.to_pydatetime(),
        end=end.to_pydatetime(),
        seed=4,
        faults=[sm.FrozenMeter("FT-204", frozen_from.to_pydatetime(), frozen_to.to_pydatetime())],
        operation=sm.OperatingSpec(trips_per_year=40.0),
    )
    times = pd.DatetimeIndex(sim.times).tz_localize("UTC")
    frames = [
        pd.DataFrame({"time": times, "tag": tag, "value": values, "good": True})
        for tag, values in sim.values.items()
    ]
    readings = pd.concat(frames, ignore_index=True)
    readings["tag"] = readings["tag"].astype(object)
    specs = {tag: TagLimits(kind=KINDS.get(tag[:2], "other")) for tag in sim.values}
    settings = ScreenSettings()
    t0 = time.perf_counter()
    result = screen(
        readings,
        specs,
        settings,
        start=start,
        end=end,
        header_pressure_tag="PT-100",
        total_flow_tag="FT-100",
    )
    seconds = time.perf_counter() - t0

    flags = result.flags
    table = flags.groupby("tag")[[*FLAGS, "usable"]].sum().astype(int)
    table.insert(0, "samples", flags.groupby("tag").size())
    print(f"{args.days} days of 1-min data, {len(sim.values)} tags, {len(flags):,} samples")
    print(table.to_string())
    noise = sm.NoiseSpec()
    per_tag = len(times)
    print(
        f"\nexpected per tag from the simulator: NaN ≈ {noise.nan_fraction * per_tag:.0f}, "
        f"spikes ≈ {noise.spike_fraction * per_tag:.0f} (fewer on a frozen stretch)"
    )

    if "FT-204" not in sim.truth.instrument_fault:
        print("\nthe frozen FT-204 stretch lies beyond this period: use more --days")
        return
    ft = result.for_tag("FT-204")
    truth = pd.Series(sim.truth.instrument_fault["FT-204"], index=times)
    hit = ft["frozen"] & truth
    first = hit[hit].index.min()
    print(
        f"frozen FT-204 {frozen_from:%m-%d %H:%M} → {frozen_to:%m-%d %H:%M}: "
        f"{int(hit.sum())} of {int(truth.sum())} frozen samples flagged (from "
        f"{(first - frozen_from).total_seconds() / 60:.0f} min after it froze: a run is "
        f"called frozen once it has lasted {settings.frozen_s / 60:.0f} min, then "
        f"flagged whole); "
        f"false frozen flags on FT-204 {int((ft['frozen'] & ~truth).sum())}, on the other "
        f"tags {int(flags.loc[flags['tag'] != 'FT-204', 'frozen'].sum())}"
    )
    running = pd.Series(sim.truth.pump_running, index=times)
    pt = result.for_tag("PT-100")
    off = pt["pump_off"]
    print(
        f"pump off (truth) {int((~running).sum())} min; flagged pump_off {int(off.sum())} "
        f"min, of which truly off {int((off & ~running).sum())}; start-up "
        f"{int(pt['startup'].sum())} min flagged"
    )
    print(f"screen: {len(flags) / seconds:,.0f} samples/s ({seconds:.2f} s)")


if __name__ == "__main__":
    main()
