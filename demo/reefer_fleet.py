"""Invented demo stream: a fleet of refrigerated containers ("reefers") reporting telemetry.

Everything here is made up for the demo; no real fleet, vendor or place is modelled. Each
row is one report of one container; the label ``excursion_next_hour`` says whether the
cargo temperature leaves its band within the next hour. The label follows a few readable
rules (the answer key in ``demo/README.md``) plus 4 % flipped labels, and about 2 % of each
sensor reading is empty. At ``drift_at`` of the rows the regime changes: a fleet-wide
compressor firmware update moves the current that signals a failing compressor from
6.0 A to 4.0 A (and adds a low-speed mode that the old rule would flag), and a new cargo,
``bananas``, appears with its own setpoint and its own rule.

With ``energy=True`` each row also carries a numeric target for a regression tree,
``unit_kwh_per_hour``: the electrical energy the unit draws, which follows a formula of
ambient air, setpoint, door and defrost (the answer key in ``demo/README.md``) and drops
by 30 % for the compressor's share at the firmware update. It is off by default, so the
classification stream and its file stay exactly as they were.

Public names: :func:`generate`, :func:`write_csv`, :func:`drift_row`, :data:`COLUMNS`,
:data:`ENERGY_COLUMN`.
Run ``python demo/reefer_fleet.py --help`` for the command line.
"""

from __future__ import annotations

from pathlib import Path

import click
import numpy as np
import pandas as pd

from stream.checks import require_float, require_int
from stream.errors import ConfigError

COLUMNS = (
    "container_id", "time", "cargo", "setpoint_c", "supply_air_c", "return_air_c",
    "delta_t_c", "ambient_c", "compressor_amps", "door", "door_open_min", "defrost",
    "excursion_next_hour",
)
"""Column order of the generated frame and CSV."""

ENERGY_COLUMN = "unit_kwh_per_hour"
"""The numeric target added after :data:`COLUMNS` when ``energy=True``."""

REPORT_INTERVAL_S = 300
"""Each container reports every five minutes."""

START = np.datetime64("2025-03-03T00:00:00", "s")
"""Default time of the first report (UTC)."""

# The answer key (demo/README.md) in constants; tests restate the rules independently.
DOOR_MIN = 15            # door open at least this many minutes ...
DOOR_AMBIENT_C = 28.0    # ... while ambient is at least this warm
DELTA_T_SMALL_C = 1.5    # return minus supply below this: little cooling ...
AMPS_LOW_BEFORE = 6.0    # ... and compressor current below this -> failing (before drift)
AMPS_LOW_AFTER = 4.0     # the same threshold after the firmware update
DEFROST_AMBIENT_C = 25.0  # chilled cargo in defrost at or above this ambient
BANANA_RETURN_C = 15.0   # bananas: return air at or above this (ripening heat)
LABEL_FLIP = 0.04        # share of labels flipped at random
MISSING = 0.02           # share of each sensor reading left empty
# The energy answer key: kWh per hour = compressor + door (+ heaters in defrost)
KWH_BASE = 1.2           # compressor at zero lift (ambient = setpoint), kWh per hour
KWH_PER_LIFT_C = 0.045   # ... plus this per degC of lift, ambient_c - setpoint_c
KWH_DOOR = 0.9           # door open: fans and coil fight the warm air coming in
KWH_DEFROST = 3.5        # defrost: compressor off, heaters on, in place of the compressor
KWH_FIRMWARE = 0.7       # after the firmware update the compressor's share is 30 % lower
KWH_NOISE = 0.08         # standard deviation of the meter's noise, kWh per hour

_CARGO_BEFORE = np.array(["chilled", "frozen", "pharma"], dtype=object)
_CARGO_SHARE = (0.45, 0.35, 0.20)
_SETPOINTS = (np.array([0.0, 2.0, 4.0]), np.array([-25.0, -20.0, -18.0]), np.array([5.0]))
_BANANA_SETPOINT_C = 13.3
_BANANA_SHARE = 0.20  # share of container slots replaced by banana units at the drift point


def drift_row(rows: int, drift_at: float) -> int:
    """Index of the first row of the second regime (``rows`` when there is no drift).

    Parameters
    ----------
    rows
        Rows in the stream.
    drift_at
        Fraction of the rows after which the regime changes, in [0, 1].
    """
    rows = require_int("rows", rows, 0)
    drift_at = require_float("drift_at", drift_at, 0.0, 1.0, low_open=False, high_open=False)
    return int(round(drift_at * rows))


def _episodes(rng: np.random.Generator, shape: tuple[int, int], p_start: float,
              min_steps: int, max_steps: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Random on-episodes per container column of a (steps, containers) grid.

    Returns ``active`` (bool), ``age`` (steps since the episode began, -1 when none has)
    and ``start`` (row of the grid where the current episode began, -1 when none has),
    so per-episode draws can be gathered as ``draw[start, column]``. A new start inside a
    running episode restarts it.
    """
    steps, _ = shape
    began = rng.random(shape) < p_start
    length = rng.integers(min_steps, max_steps + 1, size=shape)
    start = np.maximum.accumulate(np.where(began, np.arange(steps)[:, None], -1), axis=0)
    age = np.where(start >= 0, np.arange(steps)[:, None] - start, -1)
    cols = np.broadcast_to(np.arange(shape[1]), shape)
    active = (start >= 0) & (age < length[np.maximum(start, 0), cols])
    return active, age, start


def _compressor(rng: np.random.Generator, ambient: np.ndarray, frozen: np.ndarray,
                defrost: np.ndarray, fault: np.ndarray, severity: np.ndarray,
                economy: np.ndarray, after: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Compressor current (A) and delta-T (return minus supply, degC) by operating mode.

    Modes: defrost (heaters on, supply warmer than return), fault (a weakening compressor:
    small delta-T, current falling with severity), economy (part load) and full load. The
    firmware update (``after``) lowers every compressor current, turns economy into a
    low-speed mode with a small delta-T, and moves the failing current from below 6 A to
    below 4 A. Delta-T is kept >= 2.0 outside faults and current >= 7.0 in defrost, so
    only faults fall under the answer key's compressor rule.
    """
    n = ambient.shape[0]
    full_amps = 7.5 + 0.15 * (ambient - 20.0) + 2.5 * frozen + rng.normal(0, 0.6, n)
    amps = full_amps - 2.0 * after
    delta = np.clip(rng.normal(4.5, 0.8, n), 2.0, None)
    eco_amps = np.where(after, rng.uniform(4.0, 5.5, n), rng.uniform(4.0, 7.0, n))
    eco_delta = np.where(after, rng.uniform(0.8, 2.5, n), rng.uniform(2.0, 4.0, n))
    amps = np.where(economy, eco_amps, amps)
    delta = np.where(economy, eco_delta, delta)
    fault_amps = np.where(after, 1.5, 2.5) + 7.0 * severity + rng.normal(0, 0.3, n)
    amps = np.where(fault, fault_amps, amps)
    delta = np.where(fault, np.clip(rng.normal(0.7, 0.35, n), -0.2, 1.4), delta)
    amps = np.where(defrost, np.clip(8.5 + rng.normal(0, 0.5, n), 7.0, None), amps)
    delta = np.where(defrost, -rng.uniform(0.5, 3.0, n), delta)
    return np.clip(amps, 0.0, None), delta


def _energy(seed: int, ambient: np.ndarray, setpoint: np.ndarray, door: np.ndarray,
            defrost: np.ndarray, after: np.ndarray) -> np.ndarray:
    """Energy the unit draws, kWh per hour, from the recorded readings (the answer key).

    Its noise comes from its own generator, seeded from ``seed``, so that asking for the
    column leaves every other column as it was.
    """
    lift = ambient - setpoint
    compressor = (KWH_BASE + KWH_PER_LIFT_C * lift) * np.where(after, KWH_FIRMWARE, 1.0)
    kwh = np.where(defrost, KWH_DEFROST, compressor) + KWH_DOOR * door
    noise = np.random.default_rng([seed, 1]).normal(0.0, KWH_NOISE, ambient.shape[0])
    return np.round(kwh + noise, 2)


def generate(rows: int, seed: int = 7, drift_at: float = 0.6, *,
             containers: int = 100, start: np.datetime64 = START,
             energy: bool = False) -> pd.DataFrame:
    """Generate the reefer-fleet stream.

    Parameters
    ----------
    rows
        Number of reports (rows), >= 0.
    seed
        Seed of ``numpy.random.default_rng``; the same seed gives the same frame.
    drift_at
        Fraction of the rows after which the second regime starts; 1 means no drift.
    containers
        Container slots reporting round-robin; 1 to 300, so that reports are at least one
        second apart and ``time`` is strictly increasing.
    start
        Time of the first report, UTC.
    energy
        Add the numeric target :data:`ENERGY_COLUMN` after the other columns.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`COLUMNS` (and :data:`ENERGY_COLUMN` with ``energy``); ``time`` is
        datetime64 UTC, categorical fields are strings, empty readings are NaN (the energy
        meter is never empty). ``frame.attrs["drift_row"]`` is the first second-regime row.
    """
    rows = require_int("rows", rows, 0)
    first_b = drift_row(rows, drift_at)
    seed = require_int("seed", seed, 0)
    n_slots = require_int("containers", containers, 1)
    if n_slots > 300:
        raise ConfigError(f"containers must be a whole number in [1, 300], got {containers!r}")
    rng = np.random.default_rng(seed)
    steps = max(1, -(-rows // n_slots))
    grid = (steps, n_slots)

    # Per-slot constants: cargo, setpoint, route climate, the banana replacements.
    cargo_code = rng.choice(3, size=n_slots, p=_CARGO_SHARE)
    setpoint = np.empty(n_slots)
    for code, choices in enumerate(_SETPOINTS):
        here = cargo_code == code
        setpoint[here] = rng.choice(choices, size=int(here.sum()))
    banana_slot = rng.random(n_slots) < _BANANA_SHARE
    ripening = rng.uniform(-0.8, 1.6, n_slots)  # extra load heat; < 0: fruit loaded cold
    climate = rng.uniform(16.0, 32.0, n_slots)
    hour_shift = rng.uniform(0.0, 24.0, n_slots)
    defrost_phase = rng.integers(0, 144, n_slots)

    # Time-varying state on the (steps, slots) grid, then gathered into report order.
    door_on, door_age, door_start = _episodes(rng, grid, 0.03, 1, 10)
    door_offset = rng.uniform(0.0, 5.0, grid)
    fault_on, _, fault_start = _episodes(rng, grid, 0.003, 12, 72)
    severity = rng.random(grid)
    order = np.argsort(rng.random(grid), axis=1)  # who reports first within each round

    step = np.repeat(np.arange(steps), n_slots)[:rows]
    slot = order.ravel()[:rows]
    n = rows
    after = np.arange(n) >= first_b  # rows of the second regime
    seconds = step * REPORT_INTERVAL_S + np.tile(np.arange(n_slots), steps)[:rows] * (
        REPORT_INTERVAL_S // n_slots)
    time = start + seconds.astype("timedelta64[s]")

    cargo = np.where(after & banana_slot[slot], "bananas", _CARGO_BEFORE[cargo_code[slot]])
    is_banana = cargo == "bananas"
    chilled = cargo == "chilled"
    frozen = cargo == "frozen"
    setp = np.where(is_banana, _BANANA_SETPOINT_C, setpoint[slot])
    # Banana units are new containers (new ids) taking over the slots of retired ones.
    old_ids = np.array([f"RC-{400 + i:04d}" for i in range(n_slots)], dtype=object)
    new_ids = np.array([f"RC-{1000 + i:04d}" for i in range(n_slots)], dtype=object)
    ids = np.where(is_banana, new_ids[slot], old_ids[slot])

    hour = (seconds / 3600.0 + hour_shift[slot]) % 24.0
    ambient = climate[slot] + 5.0 * np.sin(2 * np.pi * (hour - 9.0) / 24.0) + rng.normal(0, 0.7, n)

    # Timed defrost: frozen units every 12 h for 40 min, the others every 4 h for 30 min.
    defrost = ((step + defrost_phase[slot]) % np.where(frozen, 144, 48)) < np.where(frozen, 8, 6)
    door = door_on[step, slot]
    door_min = np.where(door, 5 * door_age[step, slot] + door_offset[np.maximum(
        door_start[step, slot], 0), slot], 0.0)
    fault = fault_on[step, slot] & ~defrost
    sev = severity[np.maximum(fault_start[step, slot], 0), slot]
    economy = ~defrost & ~fault & (rng.random(n) < np.where(
        frozen, 0.10, np.where(ambient < 25.0, 0.35, 0.10)))
    amps, delta = _compressor(rng, ambient, frozen, defrost, fault, sev, economy, after)

    heat = (0.03 * np.clip(ambient - 20.0, 0.0, None) + 0.6 * door + 0.8 * fault
            + np.where(is_banana, ripening[slot], 0.0))
    ret = setp + 0.2 + 0.25 * delta + heat + rng.normal(0, 0.2, n)
    sup = ret - delta

    # Readings as recorded; the label is computed from these, so the key holds on the file.
    ambient, amps = np.round(ambient, 1), np.round(amps, 1)
    ret, sup = np.round(ret, 1), np.round(sup, 1)
    delta = np.round(ret - sup, 1)
    door_min = np.floor(door_min)

    amps_low = np.where(after, AMPS_LOW_AFTER, AMPS_LOW_BEFORE)
    truth = ((door & (door_min >= DOOR_MIN) & (ambient >= DOOR_AMBIENT_C))
             | ((amps < amps_low) & (delta < DELTA_T_SMALL_C))
             | (chilled & defrost & (ambient >= DEFROST_AMBIENT_C))
             | (is_banana & (ret >= BANANA_RETURN_C)))
    label = truth ^ (rng.random(n) < LABEL_FLIP)
    kwh = _energy(seed, ambient, setp, door, defrost, after) if energy else None

    # Sensor dropouts: each reading empty on its own; derived fields follow their sources.
    gone = rng.random((6, n)) < MISSING
    sup = np.where(gone[0], np.nan, sup)
    ret = np.where(gone[1], np.nan, ret)
    delta = np.where(gone[0] | gone[1], np.nan, delta)
    ambient = np.where(gone[2], np.nan, ambient)
    amps = np.where(gone[3], np.nan, amps)
    door_txt = np.where(door, "open", "closed").astype(object)
    door_txt[gone[4]] = np.nan
    door_min = np.where(gone[4], np.nan, door_min)
    defrost_txt = np.where(defrost, "on", "off").astype(object)
    defrost_txt[gone[5]] = np.nan

    frame = pd.DataFrame({
        "container_id": ids,
        "time": pd.DatetimeIndex(time).tz_localize("UTC"),
        "cargo": cargo.astype(object),
        "setpoint_c": setp,
        "supply_air_c": sup,
        "return_air_c": ret,
        "delta_t_c": delta,
        "ambient_c": ambient,
        "compressor_amps": amps,
        "door": door_txt,
        "door_open_min": door_min,
        "defrost": defrost_txt,
        "excursion_next_hour": np.where(label, "yes", "no").astype(object),
    }, columns=list(COLUMNS))
    if kwh is not None:
        frame[ENERGY_COLUMN] = kwh
    frame.attrs["drift_row"] = first_b
    return frame


def write_csv(path: str | Path, rows: int, seed: int = 7, drift_at: float = 0.6,
              energy: bool = False) -> Path:
    """Generate the stream and write it as CSV (gzip when ``path`` ends in ``.gz``).

    Times are written as ISO-8601 UTC (``2025-03-03T00:00:03Z``), empty readings as empty
    fields, readings with one decimal and the energy (with ``energy``) with two. Parent
    folders are created. Returns the path written.
    """
    frame = generate(rows, seed, drift_at, energy=energy)
    if energy:
        frame[ENERGY_COLUMN] = frame[ENERGY_COLUMN].map("{:.2f}".format)
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    frame.to_csv(target, index=False, date_format="%Y-%m-%dT%H:%M:%SZ",
                 float_format="%.1f")
    return target


@click.command(context_settings={"help_option_names": ["-h", "--help"]})
@click.option("--rows", type=click.IntRange(min=0), default=200_000, show_default=True,
              help="Reports to generate (one row each).")
@click.option("--seed", type=click.IntRange(min=0), default=7, show_default=True,
              help="Random seed; the same seed gives the same file.")
@click.option("--drift-at", type=click.FloatRange(0.0, 1.0), default=0.6, show_default=True,
              help="Fraction of the rows after which the firmware update and the banana "
                   "cargo arrive; 1 for no drift.")
@click.option("--out", type=click.Path(dir_okay=False), default="demo/output/reefer.csv",
              show_default=True, help="CSV file to write; a .gz ending compresses it.")
@click.option("--energy", is_flag=True,
              help=f"Also write the numeric target {ENERGY_COLUMN} (last column).")
def main(rows: int, seed: int, drift_at: float, out: str, energy: bool) -> None:
    """Write the invented reefer-fleet stream (with one regime change) as CSV."""
    target = write_csv(out, rows, seed, drift_at, energy=energy)
    first_b = drift_row(rows, drift_at)
    click.echo(f"wrote {rows} rows to {target}; second regime from row {first_b} "
               f"(0-based, header not counted)", err=True)


if __name__ == "__main__":
    main()
