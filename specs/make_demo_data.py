"""Write the small invented tables the example specs read (specs/data/*.csv).

Every scenario here is made up for demonstration; nothing is measured. Each table has its own fixed
seed (numpy's default_rng), floats are written with a fixed number of decimals and lines end in
"\\n", so running the script twice gives byte-identical files on any machine.

    python specs/make_demo_data.py           # (re)write every table
    python specs/make_demo_data.py --check   # compare with the files on disk; exit 1 on a difference
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

DATA_DIR = Path(__file__).resolve().parent / "data"


@dataclass(frozen=True)
class Column:
    """One column of a table: its values and how each value is written (a format or plain text)."""

    name: str
    values: np.ndarray
    fmt: str | None  # "%.3f"-style for numbers; None writes str(value)


def _csv(columns: list[Column]) -> str:
    n = len(columns[0].values)
    if any(len(c.values) != n for c in columns):
        raise ValueError("columns of one table differ in length")  # a bug in a generator below

    def cell(c: Column, i: int) -> str:
        v = c.values[i]
        if c.fmt is None:
            return str(v)
        text = c.fmt % v
        # "-0.000" and "0.000" are the same number; write one of them so a sign flip in the last
        # rounded digit cannot make two runs differ
        return text[1:] if text.startswith("-") and float(text) == 0.0 else text

    lines = [",".join(c.name for c in columns)]
    lines.extend(",".join(cell(c, i) for c in columns) for i in range(n))
    return "\n".join(lines) + "\n"


def _sigmoid(z: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-z))


# ---------------------------------------------------------------- the scenarios

def parcels() -> str:
    """A parcel courier: which deliveries arrive late. String labels yes/no; a `priority` weight
    (1 standard, 2 express, 4 medical) says how much a late parcel of that kind costs."""
    rng = np.random.default_rng(20240611)
    n = 800
    distance_km = rng.lognormal(mean=2.4, sigma=0.6, size=n)
    stops = rng.poisson(12, size=n) + 1
    driver_load = rng.uniform(0.2, 1.0, size=n)
    rain_mm = np.where(rng.uniform(size=n) < 0.7, 0.0, rng.exponential(6.0, size=n))
    hub_age_years = rng.integers(1, 25, size=n)
    priority = rng.choice([1.0, 2.0, 4.0], size=n, p=[0.7, 0.25, 0.05])
    z = -4.2 + 0.06 * distance_km + 0.09 * stops + 2.2 * driver_load + 0.10 * rain_mm + 0.01 * hub_age_years
    late = np.where(rng.uniform(size=n) < _sigmoid(z), "yes", "no")
    return _csv([
        Column("parcel_id", np.arange(1, n + 1), "%d"),
        Column("distance_km", distance_km, "%.2f"),
        Column("stops", stops, "%d"),
        Column("driver_load", driver_load, "%.3f"),
        Column("rain_mm", rain_mm, "%.1f"),
        Column("hub_age_years", hub_age_years, "%d"),
        Column("priority", priority, "%.1f"),
        Column("late", late, None),
    ])


def croissants() -> str:
    """A bakery's daily croissant sales over two years. A few days carry a large catering order
    (outliers upward) and a few a power cut (outliers downward): a job for Huber; the spread grows
    with the number of tourists, so the 90th percentile is not the mean shifted."""
    rng = np.random.default_rng(7351)
    n = 730
    day = np.arange(n)
    weekday = day % 7
    is_weekend = (weekday >= 5).astype(float)
    season = np.sin(2.0 * np.pi * day / 365.0)
    temperature_c = 13.0 + 9.0 * season + rng.normal(0.0, 3.0, size=n)
    promo = (rng.uniform(size=n) < 0.12).astype(float)
    tourists_k = np.maximum(0.0, 2.0 + 3.0 * season + rng.gamma(2.0, 1.0, size=n))
    rain_mm = np.where(rng.uniform(size=n) < 0.6, 0.0, rng.exponential(4.0, size=n))
    mean_sold = (140.0 + 45.0 * is_weekend + 25.0 * promo + 22.0 * np.log1p(tourists_k)
                 - 0.9 * temperature_c - 0.05 * (temperature_c - 14.0) ** 2
                 + 0.6 * temperature_c * is_weekend - 1.5 * rain_mm)
    noise = rng.normal(0.0, 8.0 + 3.0 * tourists_k, size=n)
    sold = mean_sold + noise
    catering = rng.uniform(size=n) < 0.025
    power_cut = rng.uniform(size=n) < 0.015
    sold = np.where(catering, sold + rng.uniform(150.0, 400.0, size=n), sold)
    sold = np.where(power_cut, sold * rng.uniform(0.05, 0.3, size=n), sold)
    sold = np.maximum(0.0, np.round(sold))
    return _csv([
        Column("day", day + 1, "%d"),
        Column("is_weekend", is_weekend, "%d"),
        Column("temperature_c", temperature_c, "%.1f"),
        Column("promo", promo, "%d"),
        Column("tourists_k", tourists_k, "%.3f"),
        Column("rain_mm", rain_mm, "%.1f"),
        Column("sold", sold, "%d"),
    ])


def greenhouse() -> str:
    """A greenhouse's six sensors (air temperature, humidity, CO2, light, soil moisture, airflow,
    already rescaled by the controller) and the litres of water the drip system used that hour."""
    rng = np.random.default_rng(99182)
    n = 600
    hidden = rng.normal(size=(n, 2))  # weather and plant stage drive several sensors at once
    mixing = np.array([[1.0, 0.2], [-0.8, 0.3], [0.1, 0.9], [0.9, -0.1], [-0.3, -0.7], [0.4, 0.4]])
    sensors = hidden @ mixing.T + rng.normal(0.0, 0.5, size=(n, 6))
    coef = np.array([0.8, -0.5, 0.0, 0.6, -0.9, 0.0])
    water_l = 4.0 + sensors @ coef + rng.laplace(0.0, 0.15, size=n)
    cols = [Column("reading_id", np.arange(1, n + 1), "%d")]
    cols += [Column(f"sensor_{j + 1}", sensors[:, j], "%.4f") for j in range(6)]
    cols += [Column("water_l", water_l, "%.3f")]
    return _csv(cols)


def bikeshare() -> str:
    """A bike-share station: will the docks run out within the hour? Shortages are rare (about one
    hour in ten), so the rare class gets a larger class weight in the spec."""
    rng = np.random.default_rng(4412)
    n = 1500
    hour = rng.integers(0, 24, size=n)
    rush = ((hour >= 7) & (hour <= 9) | (hour >= 16) & (hour <= 18)).astype(float)
    temp_c = rng.normal(16.0, 7.0, size=n)
    event_nearby = (rng.uniform(size=n) < 0.08).astype(float)
    free_docks = rng.integers(0, 30, size=n)
    inflow_last_hour = rng.poisson(4 + 6 * rush)
    z = -2.6 + 1.4 * rush + 0.04 * (temp_c - 16.0) + 1.6 * event_nearby - 0.18 * free_docks \
        + 0.22 * inflow_last_hour
    shortage = np.where(rng.uniform(size=n) < _sigmoid(z), "short", "ok")
    return _csv([
        Column("hour", hour, "%d"),
        Column("rush", rush, "%d"),
        Column("temp_c", temp_c, "%.1f"),
        Column("event_nearby", event_nearby, "%d"),
        Column("free_docks", free_docks, "%d"),
        Column("inflow_last_hour", inflow_last_hour, "%d"),
        Column("shortage", shortage, None),
    ])


def library() -> str:
    """A town library: is a loan returned late? The label is stored as 0/1 numbers."""
    rng = np.random.default_rng(51007)
    n = 600
    loan_days = rng.choice([14, 21, 28], size=n)
    renewals = rng.poisson(0.8, size=n)
    prior_overdue = rng.poisson(0.6, size=n)
    distance_km = rng.gamma(2.0, 1.8, size=n)
    is_student = (rng.uniform(size=n) < 0.3).astype(float)
    items = rng.integers(1, 9, size=n)
    z = -1.4 - 0.03 * loan_days + 0.35 * renewals + 0.9 * prior_overdue + 0.12 * distance_km \
        + 0.7 * is_student + 0.08 * items
    overdue = (rng.uniform(size=n) < _sigmoid(z)).astype(int)
    return _csv([
        Column("loan_days", loan_days, "%d"),
        Column("renewals", renewals, "%d"),
        Column("prior_overdue", prior_overdue, "%d"),
        Column("distance_km", distance_km, "%.2f"),
        Column("is_student", is_student, "%d"),
        Column("items", items, "%d"),
        Column("overdue", overdue, "%d"),
    ])


def printshop() -> str:
    """A print shop's job times. The paper finish is one category, one-hot encoded in three columns
    (finish_matte, finish_gloss, finish_satin), which a group penalty keeps or drops together; the
    binding (stapled or glued, also one-hot) is a second group that has no effect at all."""
    rng = np.random.default_rng(3140)
    n = 500
    finish = rng.integers(0, 3, size=n)
    binding = rng.integers(0, 2, size=n)
    sheets = rng.integers(10, 400, size=n)
    colors = rng.integers(1, 5, size=n)
    finish_effect = np.array([0.0, 6.0, 3.5])[finish]
    minutes = 5.0 + 0.08 * sheets + 2.5 * colors + finish_effect + rng.normal(0.0, 2.0, size=n)
    return _csv([
        Column("job_id", np.arange(1, n + 1), "%d"),
        Column("sheets", sheets, "%d"),
        Column("colors", colors, "%d"),
        Column("finish_matte", (finish == 0).astype(int), "%d"),
        Column("finish_gloss", (finish == 1).astype(int), "%d"),
        Column("finish_satin", (finish == 2).astype(int), "%d"),
        Column("binding_staple", (binding == 0).astype(int), "%d"),
        Column("binding_glue", (binding == 1).astype(int), "%d"),
        Column("minutes", minutes, "%.2f"),
    ])


def toy_separable() -> str:
    """Two point clouds a line separates with room to spare (labels -1/+1 as numbers)."""
    rng = np.random.default_rng(8)
    n = 200
    side = np.where(np.arange(n) % 2 == 0, 1, -1)
    u = rng.normal(0.0, 1.0, size=n)
    # every point sits at least 0.5 away from the line u + v = 0, on its own side
    offset = side * (0.5 + rng.exponential(1.0, size=n))
    v = -u + offset * np.sqrt(2.0)
    return _csv([
        Column("u", u, "%.4f"),
        Column("v", v, "%.4f"),
        Column("side", side, "%d"),
    ])


def loaves() -> str:
    """A bakery sorts its loaves into three kinds (rye, spelt, wheat) by crust darkness, weight,
    height and moisture: each kind has its own typical values, and the kinds overlap."""
    rng = np.random.default_rng(9)
    n = 360
    kinds = np.array(["rye", "spelt", "wheat"])
    kind = rng.integers(0, 3, size=n)
    centre = np.array([[7.5, 820.0, 9.0, 41.0],   # rye: dark, heavy, low, moist
                       [5.5, 700.0, 10.5, 38.0],  # spelt
                       [4.0, 640.0, 12.0, 36.0]])  # wheat: light, tall, drier
    spread = np.array([1.1, 60.0, 1.0, 2.2])
    x = centre[kind] + rng.normal(0.0, 1.0, size=(n, 4)) * spread
    return _csv([
        Column("crust_darkness", x[:, 0], "%.2f"),
        Column("weight_g", x[:, 1], "%.1f"),
        Column("height_cm", x[:, 2], "%.2f"),
        Column("moisture_pct", x[:, 3], "%.2f"),
        Column("kind", kinds[kind], None),
    ])


def proofing() -> str:
    """A bakery's proofing room: after each batch a baker notes whether the dough came out under-,
    well- or over-proofed (under, ready, past), with the room's temperature and humidity, the minutes proofed and which of
    three ovens took the batch. How far a batch proofed grows with minutes and warmth and saturates
    in damp air (a curved boundary), and each oven adds its own lean."""
    rng = np.random.default_rng(21)
    n = 420
    temp = rng.uniform(20.0, 32.0, n)
    humidity = rng.uniform(45.0, 90.0, n)
    minutes = rng.uniform(30.0, 110.0, n)
    ovens = np.array(["deck", "rack", "stone"])
    oven = rng.integers(0, 3, size=n)
    extent = (minutes / 70.0) * np.exp((temp - 26.0) / 8.0) * (1.0 - 0.5 * np.exp(-(humidity - 45.0) / 15.0))
    extent = extent + np.array([0.0, 0.12, -0.12])[oven] + rng.normal(0.0, 0.12, n)
    states = np.array(["under", "ready", "past"])
    state = np.digitize(extent, [0.75, 1.25])
    return _csv([
        Column("room_temp_c", temp, "%.1f"),
        Column("humidity_pct", humidity, "%.1f"),
        Column("proof_min", minutes, "%.0f"),
        Column("oven", ovens[oven], None),
        Column("proof", states[state], None),
    ])


TABLES: dict[str, Callable[[], str]] = {
    "parcels.csv": parcels,
    "croissants.csv": croissants,
    "greenhouse.csv": greenhouse,
    "bikeshare.csv": bikeshare,
    "library.csv": library,
    "printshop.csv": printshop,
    "toy_separable.csv": toy_separable,
    "loaves.csv": loaves,
    "proofing.csv": proofing,
}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Write (or check) the demo tables in specs/data/.")
    parser.add_argument("--check", action="store_true",
                        help="compare freshly generated tables with the files on disk; exit 1 on a difference")
    args = parser.parse_args(argv)
    if args.check:
        stale = []
        for name, make in TABLES.items():
            path = DATA_DIR / name
            if not path.is_file():
                stale.append(f"{name}: missing")
            elif path.read_bytes() != make().encode("utf-8"):
                stale.append(f"{name}: differs from what the script generates")
        for line in stale:
            print(f"specs/data/{line}", file=sys.stderr)
        if stale:
            print("run `python specs/make_demo_data.py` to regenerate", file=sys.stderr)
            return 1
        print(f"{len(TABLES)} tables match")
        return 0
    DATA_DIR.mkdir(parents=True, exist_ok=True)
    for name, make in TABLES.items():
        (DATA_DIR / name).write_bytes(make().encode("utf-8"))
    print(f"wrote {len(TABLES)} tables to specs/data/")
    return 0


if __name__ == "__main__":
    sys.exit(main())
