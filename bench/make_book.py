"""Write a synthetic motor book (an invented scenario) as Parquet, for benchmarks.

One row per policy-period: integer-valued rating factors (driver_age, vehicle_age,
bonus_level, power, tenure), continuous ones (density, lat, lon, vehicle_value, mileage),
categoricals (region: 20 levels, fuel: 3, vehicle_group: 500), an exposure in (0, 1], a
gaussian response ``y`` with a known additive truth, a Poisson ``claim_count`` from a
known log-linear additive truth with exposure, and ``claim_amount``: the total of the
row's claims, each gamma with mean 1,500 × exp(½·s(x)) and shape 2 (0 without claims),
for severity (gamma) and pure-premium (Tweedie) fits. Every numeric column has its own effect, so
eight splines plus a (lat, lon) surface use ten columns without overlap
(bench/reference.py).

Deterministic: the book's structure (region centres, level effects, level frequencies)
comes from ``seed``; rows are made in chunks of ``CHUNK_ROWS``, chunk k from the stream
``(seed, k)``, so the same ``--rows`` and ``--seed`` give the same files on any machine
with the same numpy. Memory is bounded by one chunk, whatever the number of rows.

Layout: ``DIR/book-00000.parquet`` ... (``FILE_ROWS`` rows each, one row group per chunk)
and ``DIR/book.json`` (rows, seed, files, the truth), written last; a directory whose
manifest matches is reused by the benchmark. ``--holdout`` writes rows of the same book
(same seed, so the same regions, level effects and truth) from a separate range of chunk
streams, ``(seed, HOLDOUT_CHUNK + k)``, for out-of-sample checks.

    python bench/make_book.py --rows 10000000 --out bench/data/book-10000000
"""

from __future__ import annotations

import argparse
import glob
import json
import os
import sys
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

GENERATOR_VERSION = 3              # 2: tenure and mileage added; 3: claim_amount
CHUNK_ROWS = 1_000_000          # rows made at a time = one Parquet row group
FILE_ROWS = 2_000_000           # rows per file
HOLDOUT_CHUNK = 10**7           # first chunk stream of a hold-out book (never used by a book)
N_REGIONS = 20
N_GROUPS = 500
FUELS = ("petrol", "diesel", "electric")
FUEL_P = (0.52, 0.43, 0.05)
FUEL_EFFECT = (0.0, 0.10, -0.15)
BASE_FREQUENCY = -2.3           # log claim frequency per policy-year at the reference
GAUSS_CENTRE, GAUSS_SCALE, GAUSS_NOISE = 2.0, 3.0, 1.0
SEVERITY_MEAN, SEVERITY_SHAPE = 1500.0, 2.0   # gamma claim sizes: mean per claim, shape
SEVERITY_SLOPE = 0.5                         # log claim size = log mean + 0.5·s(x)

NUMERIC = ("driver_age", "vehicle_age", "bonus_level", "power", "tenure",
           "density", "lat", "lon", "vehicle_value", "mileage")
CATEGORICAL = ("region", "fuel", "vehicle_group")

# the additive truth on the log-frequency scale, one function per numeric factor (numpy)
TRUTH_TEXT = {
    "driver_age": "1.1*exp(-(a-18)/7) + 0.35*((a-18)/72)**2",
    "vehicle_age": "-0.25*log1p(v) + 0.012*v",
    "bonus_level": "0.06*b - 0.0015*b**2",
    "power": "0.09*(p-4) - 0.004*(p-4)**2",
    "density": "0.12*log10(d)",
    "lat": "0.25*sin(pi*(lat-42)/9)",
    "lon": "0.20*cos(pi*(lon+5)/13)",
    "vehicle_value": "0.18*log(v/18000)",
    "tenure": "-0.22*(1-exp(-t/3)) + 0.004*t",
    "mileage": "0.30*log(m/12000) - 0.05*log(m/12000)**2",
}


def f_driver_age(a):
    return 1.1 * np.exp(-(a - 18.0) / 7.0) + 0.35 * ((a - 18.0) / 72.0) ** 2


def f_vehicle_age(v):
    return -0.25 * np.log1p(v) + 0.012 * v


def f_bonus_level(b):
    return 0.06 * b - 0.0015 * b ** 2


def f_power(p):
    return 0.09 * (p - 4.0) - 0.004 * (p - 4.0) ** 2


def f_density(d):
    return 0.12 * np.log10(d)


def f_lat(lat):
    return 0.25 * np.sin(np.pi * (lat - 42.0) / 9.0)


def f_lon(lon):
    return 0.20 * np.cos(np.pi * (lon + 5.0) / 13.0)


def f_vehicle_value(v):
    return 0.18 * np.log(v / 18000.0)


def f_tenure(t):
    return -0.22 * (1.0 - np.exp(-t / 3.0)) + 0.004 * t


def f_mileage(m):
    u = np.log(m / 12000.0)
    return 0.30 * u - 0.05 * u ** 2


SMOOTH_TRUTH = {
    "driver_age": f_driver_age, "vehicle_age": f_vehicle_age, "bonus_level": f_bonus_level,
    "power": f_power, "density": f_density, "lat": f_lat, "lon": f_lon,
    "vehicle_value": f_vehicle_value, "tenure": f_tenure, "mileage": f_mileage,
}


def structure(seed: int) -> dict:
    """The seed-level parameters of the book (small; shared by every chunk)."""
    rng = np.random.default_rng([seed, 2**31 - 1])
    region_p = rng.dirichlet(np.full(N_REGIONS, 3.0))
    zipf = 1.0 / (np.arange(N_GROUPS) + 10.0) ** 1.1
    group_p = rng.permutation(zipf / zipf.sum())
    return {
        "region_labels": [f"R{k + 1:02d}" for k in range(N_REGIONS)],
        "region_p": region_p,
        "region_lat": rng.uniform(42.5, 50.5, N_REGIONS),
        "region_lon": rng.uniform(-4.0, 7.5, N_REGIONS),
        "region_density": rng.normal(5.0, 1.0, N_REGIONS),   # log people per km²
        "region_effect": rng.normal(0.0, 0.15, N_REGIONS),
        "group_labels": [f"G{k + 1:03d}" for k in range(N_GROUPS)],
        "group_p": group_p,
        "group_effect": rng.normal(0.0, 0.10, N_GROUPS),
    }


def _dictionary(codes: np.ndarray, labels) -> pa.DictionaryArray:
    return pa.DictionaryArray.from_arrays(pa.array(codes.astype(np.int32)),
                                          pa.array(list(labels), type=pa.string()))


def log_relative_frequency(numeric: dict, region: np.ndarray, fuel: np.ndarray,
                           group: np.ndarray, st: dict) -> np.ndarray:
    """s(x) of the truth: the smooth functions plus the level effects (level codes)."""
    s = np.zeros(len(region))
    for name, f in SMOOTH_TRUTH.items():
        s += f(np.asarray(numeric[name], dtype=np.float64))
    s += st["region_effect"][region] + np.asarray(FUEL_EFFECT)[fuel]
    s += st["group_effect"][group]
    return s


def true_frequency(frame, seed: int) -> np.ndarray:
    """The true claim frequency per unit exposure of each row of a book (a pandas
    DataFrame or dict of columns with the book's labels), from the book's seed."""
    st = structure(seed)
    codes = {col: _codes_of(np.asarray(frame[col]).astype(str), labels)
             for col, labels in (("region", st["region_labels"]), ("fuel", FUELS),
                                 ("vehicle_group", st["group_labels"]))}
    numeric = {c: np.asarray(frame[c], dtype=np.float64) for c in SMOOTH_TRUTH}
    s = log_relative_frequency(numeric, codes["region"], codes["fuel"], codes["vehicle_group"],
                               st)
    return np.exp(BASE_FREQUENCY + s)


def _codes_of(values: np.ndarray, labels) -> np.ndarray:
    """Positions of ``values`` in ``labels`` (every value must be a label)."""
    uniq, inverse = np.unique(values, return_inverse=True)
    lookup = {lab: k for k, lab in enumerate(labels)}
    return np.array([lookup[u] for u in uniq], dtype=np.int64)[inverse]


def make_chunk(seed: int, chunk: int, rows: int, st: dict, first_id: int = 0) -> pa.Table:
    """Rows ``first_id ..`` of chunk ``chunk`` of the book (deterministic in its arguments)."""
    rng = np.random.default_rng([seed, chunk])
    n = rows
    region = rng.choice(N_REGIONS, size=n, p=st["region_p"])
    fuel = rng.choice(len(FUELS), size=n, p=FUEL_P)
    group = rng.choice(N_GROUPS, size=n, p=st["group_p"])
    driver_age = np.clip(np.rint(18.0 + rng.gamma(3.5, 8.0, n)), 18, 90).astype(np.int16)
    vehicle_age = np.clip(np.rint(rng.gamma(2.0, 3.5, n)), 0, 25).astype(np.int16)
    bonus_level = np.clip(np.rint(rng.exponential(4.0, n)), 0, 22).astype(np.int16)
    power = (4 + rng.binomial(11, 0.3, n)).astype(np.int16)
    density = np.clip(np.exp(st["region_density"][region] + rng.normal(0.0, 1.3, n)),
                      1.0, 30000.0)
    lat = np.clip(st["region_lat"][region] + rng.normal(0.0, 0.6, n), 41.5, 51.5)
    lon = np.clip(st["region_lon"][region] + rng.normal(0.0, 0.6, n), -5.5, 9.5)
    vehicle_value = np.exp(np.log(18000.0) + 0.08 * (power - 7.0) - 0.03 * vehicle_age
                           + rng.normal(0.0, 0.45, n))
    full_year = rng.random(n) < 0.55
    exposure = np.where(full_year, 1.0, np.maximum(1.0 - rng.random(n), 1.0 / 365.0))
    # years with the insurer: at most the years since 18, many short and a long tail
    tenure = np.minimum(np.rint(rng.gamma(1.3, 4.5, n)), driver_age - 18.0)
    tenure = np.clip(tenure, 0, 30).astype(np.int16)
    # annual distance: lognormal around 12 000 km, a little lower where density is high
    mileage = np.clip(np.exp(np.log(12000.0) - 0.06 * (np.log(density) - 5.0)
                             + rng.normal(0.0, 0.5, n)), 500.0, 150000.0)

    numeric = {"driver_age": driver_age, "vehicle_age": vehicle_age,
               "bonus_level": bonus_level, "power": power, "tenure": tenure,
               "density": density, "lat": lat, "lon": lon, "vehicle_value": vehicle_value,
               "mileage": mileage}
    s = log_relative_frequency(numeric, region, fuel, group, st)
    y = GAUSS_CENTRE + GAUSS_SCALE * s + rng.normal(0.0, GAUSS_NOISE, n)
    claim_count = rng.poisson(exposure * np.exp(BASE_FREQUENCY + s)).astype(np.int32)
    # drawn last, so the columns above are those of generator version 2
    severity = SEVERITY_MEAN * np.exp(SEVERITY_SLOPE * s)
    claim_amount = np.where(
        claim_count > 0,
        rng.gamma(SEVERITY_SHAPE * np.maximum(claim_count, 1), severity / SEVERITY_SHAPE), 0.0)

    return pa.table({
        "policy_id": np.arange(first_id, first_id + n, dtype=np.int64),
        **numeric,
        "region": _dictionary(region, st["region_labels"]),
        "fuel": _dictionary(fuel, FUELS),
        "vehicle_group": _dictionary(group, st["group_labels"]),
        "exposure": exposure,
        "y": y,
        "claim_count": claim_count,
        "claim_amount": claim_amount,
    })


def book_table(rows: int, seed: int = 20240601) -> pa.Table:
    """A small book in memory (for JIT warm-up and checks); one chunk, ``rows`` rows."""
    return make_chunk(seed, 10**6, rows, structure(seed))


def manifest_matches(out: str, rows: int, seed: int, holdout: bool = False) -> bool:
    """Whether ``out`` holds this book (rows, seed, generator version, hold-out or not)."""
    path = os.path.join(out, "book.json")
    if not os.path.exists(path):
        return False
    with open(path) as fh:
        m = json.load(fh)
    return (m.get("rows") == rows and m.get("seed") == seed
            and m.get("generator_version") == GENERATOR_VERSION
            and m.get("first_chunk", 0) == (HOLDOUT_CHUNK if holdout else 0)
            and all(os.path.exists(os.path.join(out, f)) for f in m.get("files", [])))


def write_book(rows: int, out: str, seed: int = 20240601, verbose: bool = False,
               holdout: bool = False) -> dict:
    """Write the book into ``out`` (created; old ``book-*.parquet`` there are removed).
    ``holdout``: rows from the chunk streams ``HOLDOUT_CHUNK + k`` instead of ``k`` (same
    book, other rows)."""
    if rows < 1:
        raise ValueError("rows must be positive")
    os.makedirs(out, exist_ok=True)
    for old in glob.glob(os.path.join(out, "book-*.parquet")) + [os.path.join(out, "book.json")]:
        if os.path.exists(old):
            os.remove(old)
    st = structure(seed)
    first_chunk = HOLDOUT_CHUNK if holdout else 0
    files = []
    t0 = time.perf_counter()
    n_chunks = -(-rows // CHUNK_ROWS)
    per_file = FILE_ROWS // CHUNK_ROWS
    writer = None
    tmp = final = None
    for k in range(n_chunks):
        if k % per_file == 0:
            if writer is not None:
                writer.close()
                os.replace(tmp, final)
            name = f"book-{k // per_file:05d}.parquet"
            final = os.path.join(out, name)
            tmp = final + ".tmp"
            writer = None
            files.append(name)
        n = min(CHUNK_ROWS, rows - k * CHUNK_ROWS)
        table = make_chunk(seed, first_chunk + k, n, st,
                           first_id=(first_chunk + k) * CHUNK_ROWS)
        if writer is None:
            writer = pq.ParquetWriter(tmp, table.schema, compression="snappy")
        writer.write_table(table, row_group_size=CHUNK_ROWS)
        if verbose:
            done = k * CHUNK_ROWS + n
            print(f"  {done:>12,d} rows  {time.perf_counter() - t0:7.1f} s", file=sys.stderr)
    writer.close()
    os.replace(tmp, final)
    manifest = {
        "generator_version": GENERATOR_VERSION, "rows": rows, "seed": seed, "files": files,
        "first_chunk": first_chunk,
        "chunk_rows": CHUNK_ROWS, "file_rows": FILE_ROWS,
        "truth": {
            "log_frequency": f"{BASE_FREQUENCY} + s(x)",
            "gaussian_y": f"{GAUSS_CENTRE} + {GAUSS_SCALE}*s(x) + N(0, {GAUSS_NOISE}^2)",
            "claim_amount": f"sum of claim_count gamma claims, mean {SEVERITY_MEAN}*exp("
                            f"{SEVERITY_SLOPE}*s(x)), shape {SEVERITY_SHAPE}",
            "s(x)": "sum of the smooth functions + region + fuel + vehicle_group effects",
            "smooth": TRUTH_TEXT,
            "region_effect": dict(zip(st["region_labels"], st["region_effect"].tolist())),
            "fuel_effect": dict(zip(FUELS, FUEL_EFFECT)),
            "vehicle_group_effect": dict(zip(st["group_labels"], st["group_effect"].tolist())),
        },
        "seconds": round(time.perf_counter() - t0, 2),
    }
    tmp_m = os.path.join(out, "book.json.tmp")
    with open(tmp_m, "w") as fh:
        json.dump(manifest, fh, indent=1)
    os.replace(tmp_m, os.path.join(out, "book.json"))
    return manifest


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, required=True, help="number of rows")
    ap.add_argument("--out", required=True, help="output directory")
    ap.add_argument("--seed", type=int, default=20240601)
    ap.add_argument("--holdout", action="store_true",
                    help="rows from the hold-out chunk streams (same book, other rows)")
    ap.add_argument("--quiet", action="store_true")
    args = ap.parse_args(argv)
    m = write_book(args.rows, args.out, args.seed, verbose=not args.quiet,
                   holdout=args.holdout)
    print(f"wrote {m['rows']:,d} rows in {len(m['files'])} file(s) to {args.out} "
          f"({m['seconds']:.1f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
