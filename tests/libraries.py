"""An invented multi-wave panel for the wave-onboarding tests: a fictional network of
lending libraries reporting once a year.

Everything here is made up (ids ``LB-0001`` ..., five districts named after compass
points). ``waves()`` returns the base (years 2016-2021) and a clean next wave (2022)
drawn from the same process; ``faulty(fault)`` returns the next wave with one planted
fault. The process, by construction:

| column | kind | how it is made |
| --- | --- | --- |
| ``district`` | time-invariant text, closed list of 5 | drawn once per library |
| ``founded`` | time-invariant integer | 1890-2010 |
| ``building_age`` | +1 a year for every library | age in 2016 (5-80) + (year - 2016) |
| ``book_price`` | period-only | 12.00 x 1.03^(year - 2016), one national price |
| ``loan_fee`` | near-constant | 0.50 for 97% of libraries (0.25 for a few, fixed) |
| ``loans`` | time-varying integer | library level x year shock x noise |
| ``visits`` | time-varying float, 1% missing | 3.1 x loans / 100 + noise |
| ``weekly_hours`` | zero-inflated changes | 45% of years unchanged, 10% a quarter-hour correction, else a real change (sd 6 h) |
| ``has_wifi`` | 0/1, only switches on | 40% in 2016, each year 10% of the rest switch on |

About 3% of the libraries leave each year and 8 new ones join; a leaving library never
comes back.
"""

from __future__ import annotations

import numpy as np
import polars as pl

SEED = 20160101
BASE_YEARS = tuple(range(2016, 2022))
NEXT_YEAR = 2022
N_START = 300
DISTRICTS = ("north", "south", "east", "west", "centre")

#: the planted faults of ``faulty`` and the check (or rule) that should catch each
FAULTS = (
    "loans-as-text",  # a numeric column arrives as text: check's type rule (exit 1, not 2)
    "district-changed",  # a fixed answer changes across the boundary: check --against, compare
    "age-jump",  # building age rises by 31 in one year: compare implausible-jump, check --against
    "overlapping",  # rows of 2021 sent again: check --against overlapping_keys, compare
    "skipped-year",  # the wave is labelled 2023: compare's verdict, check --against step
    "fee-cut",  # the near-constant fee falls below itself: compare distribution-shift
    "hours-tenfold",  # weekly hours typed x10 for a few libraries: compare implausible-jump
    "price-split",  # the national price differs between libraries: compare period-value-differs
    "visits-missing",  # visits not reported for 40% of libraries: compare missing-jump, check max_missing
)
PLANTED = {"district-changed": 4, "age-jump": 3, "overlapping": 6, "hours-tenfold": 3}


def _libraries(rng: np.random.Generator, start: int, count: int, first_year: int) -> dict[str, np.ndarray]:
    ids = np.array([f"LB-{i:04d}" for i in range(start, start + count)])
    fee = np.where(rng.random(count) < 0.97, 0.50, 0.25)
    return {
        "library_id": ids,
        "district": rng.choice(DISTRICTS, count, p=[0.25, 0.2, 0.2, 0.2, 0.15]),
        "founded": rng.integers(1890, 2011, count),
        "age0": rng.integers(5, 81, count) - (first_year - BASE_YEARS[0]),
        "level": rng.lognormal(8.5, 0.4, count),
        "fee": fee,
        "hours0": np.round(rng.normal(38, 6, count) * 4) / 4,
        "wifi0": (rng.random(count) < 0.4).astype(np.int64),
        "joined": np.full(count, first_year),
    }


class _Process:
    """The libraries' yearly reports, year after year, from one seeded generator."""

    def __init__(self) -> None:
        self.rng = np.random.default_rng(SEED)
        self.lib = {k: v for k, v in _libraries(self.rng, 1, N_START, BASE_YEARS[0]).items()}
        self.active = np.ones(N_START, dtype=bool)
        self.hours = self.lib["hours0"].astype(float)
        self.wifi = self.lib["wifi0"].copy()
        self.next_id = N_START + 1

    def _grow(self, year: int) -> None:
        new = _libraries(self.rng, self.next_id, 8, year)
        self.next_id += 8
        for k in self.lib:
            self.lib[k] = np.concatenate([self.lib[k], new[k]])
        self.active = np.concatenate([self.active, np.ones(8, dtype=bool)])
        self.hours = np.concatenate([self.hours, new["hours0"].astype(float)])
        self.wifi = np.concatenate([self.wifi, new["wifi0"]])

    def year(self, year: int) -> pl.DataFrame:
        rng = self.rng
        if year > BASE_YEARS[0]:
            self.active &= rng.random(self.active.size) > 0.03
            self._grow(year)
            n = self.hours.size
            u = rng.random(n)
            change = np.where(u < 0.45, 0.0, np.where(u < 0.55, rng.choice([-0.25, 0.25], n),
                                                      np.round(rng.normal(0, 6, n) * 4) / 4))
            self.hours = np.clip(self.hours + change, 10, 70)
            self.wifi = np.where((self.wifi == 0) & (rng.random(n) < 0.10), 1, self.wifi)
        idx = np.nonzero(self.active)[0]
        m = idx.size
        shock = rng.normal(0, 0.02)
        loans = np.round(self.lib["level"][idx] * np.exp(shock + rng.normal(0, 0.15, m))).astype(np.int64)
        visits = np.round(3.1 * loans / 100 + rng.normal(0, 8, m), 1)
        visits = np.where(rng.random(m) < 0.01, np.nan, visits)
        return pl.DataFrame({
            "library_id": self.lib["library_id"][idx],
            "year": np.full(m, year, dtype=np.int64),
            "district": self.lib["district"][idx],
            "founded": self.lib["founded"][idx],
            "building_age": (self.lib["age0"][idx] + (year - BASE_YEARS[0])).astype(np.int64),
            "book_price": np.full(m, round(12.0 * 1.03 ** (year - BASE_YEARS[0]), 2)),
            "loan_fee": self.lib["fee"][idx],
            "loans": loans,
            "visits": visits,
            "weekly_hours": self.hours[idx],
            "has_wifi": self.wifi[idx],
        }).with_columns(pl.col("visits").fill_nan(None))


def waves() -> tuple[pl.DataFrame, pl.DataFrame]:
    """(the base: every report of 2016-2021, the clean next wave of 2022)."""
    proc = _Process()
    base = pl.concat([proc.year(y) for y in BASE_YEARS])
    return base, proc.year(NEXT_YEAR)


def _rows(frame: pl.DataFrame, n: int, seed: int) -> pl.Expr:
    """A mask of ``n`` fixed rows of ``frame`` (returning libraries, by a seeded draw)."""
    picked = np.random.default_rng(seed).choice(frame.height, n, replace=False)
    mask = np.zeros(frame.height, dtype=bool)
    mask[picked] = True
    return pl.lit(pl.Series(mask))


def faulty(fault: str, base: pl.DataFrame, clean: pl.DataFrame) -> pl.DataFrame:
    """The clean next wave with one planted ``fault`` (one of FAULTS).

    ``loans-as-text`` returns the wave with ``loans`` as text (one value 'n/a'); write it
    to a CSV file so that a reader sees a text column.
    """
    returning = clean.filter(pl.col("library_id").is_in(base["library_id"].implode()))
    if fault == "loans-as-text":
        return clean.with_columns(
            pl.when(pl.int_range(pl.len()) == 7).then(pl.lit("n/a")).otherwise(pl.col("loans").cast(pl.String))
            .alias("loans")
        )
    if fault == "district-changed":
        ids = returning["library_id"].head(PLANTED[fault]).implode()
        other = pl.when(pl.col("district") == "north").then(pl.lit("south")).otherwise(pl.lit("north"))
        return clean.with_columns(pl.when(pl.col("library_id").is_in(ids)).then(other)
                                  .otherwise(pl.col("district")).alias("district"))
    if fault == "age-jump":
        ids = returning["library_id"].slice(20, PLANTED[fault]).implode()
        return clean.with_columns(pl.when(pl.col("library_id").is_in(ids)).then(pl.col("building_age") + 30)
                                  .otherwise(pl.col("building_age")).alias("building_age"))
    if fault == "overlapping":
        last = base.filter(pl.col("year") == BASE_YEARS[-1]).head(PLANTED[fault])
        return pl.concat([clean, last])
    if fault == "skipped-year":
        return clean.with_columns(pl.lit(NEXT_YEAR + 1, dtype=pl.Int64).alias("year"),
                                  (pl.col("building_age") + 1).alias("building_age"))
    if fault == "fee-cut":
        return clean.with_columns((pl.col("loan_fee") - 0.10).round(2).alias("loan_fee"))
    if fault == "hours-tenfold":
        ids = returning["library_id"].slice(40, PLANTED[fault]).implode()
        return clean.with_columns(pl.when(pl.col("library_id").is_in(ids)).then(pl.col("weekly_hours") * 10)
                                  .otherwise(pl.col("weekly_hours")).alias("weekly_hours"))
    if fault == "price-split":
        return clean.with_columns(pl.when(pl.int_range(pl.len()) % 3 == 0).then(pl.col("book_price") + 4.0)
                                  .otherwise(pl.col("book_price")).alias("book_price"))
    if fault == "visits-missing":
        return clean.with_columns(pl.when(_rows(clean, int(clean.height * 0.4), 5)).then(None)
                                  .otherwise(pl.col("visits")).alias("visits"))
    raise ValueError(fault)
