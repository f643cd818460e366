"""The invented demo: a fictional regional registry of family orchards.

Everything here is made up: the registry, the orchards, the numbers. The
generator is vectorised numpy with fixed seeds, so the shipped files in
``examples/`` are reproducible byte for byte (``tests/test_demo.py``).

The truth (see ``examples/README.md`` for the full list of planted faults):

    log_yield_ha = INTERCEPT
                   + b_rain * rainfall_mm + b_irr * irrigation_h + b_lab * labour_days
                   + g_alt * altitude_m + soil effect + g_train * founder_training_yrs
                   + b_frost * frost_alert + b_age * tree_age + b_org * organic
                   + SIGMA_U * u_i + SIGMA_E * e_it

with u_i (the orchard's unobserved management quality) and e_it independent
standard normals. labour_days and founder_training_yrs depend on u_i; rainfall,
irrigation, altitude and soil do not. Irrigation hours and training share an
exogenous orchard trait (water access), so the orchard means of irrigation are
strong instruments for training in Hausman-Taylor.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import polars as pl

ORCHARD_SEED = 20170401
NEXT_SEASON_SEED = 20250401

N_ORCHARDS = 1200
SEASONS: tuple[int, ...] = tuple(range(2017, 2025))
NEXT_SEASON = 2025

#: The coefficients of the outcome model (log yield per hectare).
TRUE_COEF: dict[str, float] = {
    "const": 1.10,
    "rainfall_mm": 0.0009,
    "irrigation_h": 0.0025,
    "labour_days": 0.0040,
    "altitude_m": -0.00035,
    "founder_training_yrs": 0.030,
    "frost_alert": -0.060,
    "tree_age": 0.010,
    "organic": 0.060,
}
#: Soil class effects on log yield, relative to loam ("LM").
SOIL_EFFECT: dict[str, float] = {"LM": 0.0, "SD": -0.08, "CL": 0.04, "GR": -0.12}
SOIL_SHARE: dict[str, float] = {"LM": 0.40, "SD": 0.25, "CL": 0.20, "GR": 0.15}
SIGMA_U = 0.25  # sd of the orchard effect on log yield
SIGMA_E = 0.12  # sd of the idiosyncratic error

#: Planted faults and features of the base file, with their exact sizes.
PLANTED: dict[str, int] = {
    "duplicate_rows": 6,  # double entry: a row repeated right after itself
    "null_unit_rows": 3,  # extra rows entered without an orchard id
    "null_season_rows": 2,  # extra rows entered without a season
    "gap_orchards": 30,  # orchards missing one season inside their span
    "training_errors": 8,  # orchards whose training changes in one season (+10 years typed)
    "organic_switchers": 14,  # orchards certified organic during the panel
    "quarantine_orchards": 70,  # orchards with one quarantine season (the near-constant flag)
}

#: Planted changes of the next-season file.
PLANTED_NEXT: dict[str, int] = {
    "not_returning": 50,  # orchards present in the last base season that send nothing
    "entering": 40,  # new orchards, ids OR-1201 upwards
    "colliding_rows": 4,  # late corrections labelled with the last base season
    "training_changed": 7,  # returning orchards whose training differs from the base
    "new_soil_code": 5,  # entering orchards with soil class "PT", unknown in the base
}
NEXT_RAIN_SHIFT = -170.0  # a dry season: every orchard's rainfall is this much lower (mm)
NEXT_LABOUR_MISSING = 0.25  # share of rows whose labour days are not reported in the new season
BASE_LABOUR_MISSING = 0.02  # share of rows whose labour days are missing in the base file
BASE_IRRIGATION_MISSING = 0.01  # share of rows whose irrigation hours are missing in the base file

COLUMNS: tuple[str, ...] = (
    "orchard_id",
    "season",
    "log_yield_ha",
    "rainfall_mm",
    "irrigation_h",
    "labour_days",
    "altitude_m",
    "soil_class",
    "founder_training_yrs",
    "frost_alert",
    "tree_age",
    "organic",
    "quarantine_flag",
)


def _ids(codes: np.ndarray) -> np.ndarray:
    """Orchard ids as text with leading zeros: 7 -> 'OR-0007'."""
    return np.char.add("OR-", np.char.zfill(codes.astype(str), 4))


def _traits(seed: int, n: int, first_code: int = 1) -> dict[str, np.ndarray]:
    """Time-invariant orchard traits, the latent ones (u, water) included."""
    rng = np.random.default_rng([seed, 1])
    u = rng.standard_normal(n)
    water = rng.standard_normal(n)
    altitude = np.clip(np.rint(450 + 180 * rng.standard_normal(n)), 80, 1100).astype(np.int64)
    soil = rng.choice(np.array(list(SOIL_SHARE)), size=n, p=np.array(list(SOIL_SHARE.values())))
    training = np.clip(
        np.rint(9 + 2.2 * u + 2.0 * water + 1.2 * rng.standard_normal(n)), 0, 25
    ).astype(np.int64)
    age0 = rng.integers(3, 30, size=n)
    organic0 = rng.random(n) < 0.15
    rain_site = 0.25 * (altitude - 450) + 40 * rng.standard_normal(n)
    return {
        "code": np.arange(first_code, first_code + n),
        "u": u,
        "water": water,
        "altitude": altitude,
        "soil": soil,
        "training": training,
        "age0": age0,
        "organic0": organic0,
        "rain_site": rain_site,
    }


def _season_effects(seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Per-season frost-alert index and rainfall shock, for the base seasons."""
    rng = np.random.default_rng([seed, 2])
    frost = np.round(rng.uniform(0.5, 4.5, len(SEASONS)), 1)
    rain_shock = 60 * rng.standard_normal(len(SEASONS))
    return frost, rain_shock


def _outcome(
    rain: np.ndarray,
    irr: np.ndarray,
    labour: np.ndarray,
    altitude: np.ndarray,
    soil: np.ndarray,
    training: np.ndarray,
    frost: np.ndarray,
    age: np.ndarray,
    organic: np.ndarray,
    u: np.ndarray,
    e: np.ndarray,
) -> np.ndarray:
    c = TRUE_COEF
    soil_eff = np.zeros(len(soil))
    for code, effect in SOIL_EFFECT.items():  # four soil classes, not a loop over rows
        soil_eff[soil == code] = effect
    return (
        c["const"]
        + c["rainfall_mm"] * rain
        + c["irrigation_h"] * irr
        + c["labour_days"] * labour
        + c["altitude_m"] * altitude
        + soil_eff
        + c["founder_training_yrs"] * training
        + c["frost_alert"] * frost
        + c["tree_age"] * age
        + c["organic"] * organic
        + SIGMA_U * u
        + SIGMA_E * e
    )


def _rows_held(rng: np.random.Generator, n: int, n_seasons: int) -> tuple[np.ndarray, ...]:
    """Which (orchard, season) rows the registry holds: entry, exit and one planted internal gap
    for some orchards; returns (unit, offset in its span, season index, rows kept per orchard,
    the gap's offset per orchard or -1). Draws from ``rng`` in the registry's fixed order."""
    # Entry and exit: most orchards are there from the first season to the last.
    late = rng.random(n) >= 0.78
    start = np.where(late, rng.integers(1, n_seasons - 1, size=n), 0)
    leaves = rng.random(n) >= 0.82
    end = np.where(leaves, start + np.floor(rng.random(n) * (n_seasons - 1 - start)), n_seasons - 1)
    end = end.astype(np.int64)
    length = end - start + 1

    unit = np.repeat(np.arange(n), length)
    offset = np.arange(unit.size) - np.repeat(np.cumsum(length) - length, length)
    t = start[unit] + offset

    # Internal gaps: one season inside the span of each chosen orchard is missing.
    gap_units = rng.choice(np.flatnonzero(length >= 3), PLANTED["gap_orchards"], replace=False)
    gap_offset = np.full(n, -1)
    gap_offset[gap_units] = 1 + np.floor(rng.random(gap_units.size) * (length[gap_units] - 2))
    keep = offset != gap_offset[unit]
    unit, offset, t = unit[keep], offset[keep], t[keep]
    kept = np.bincount(unit, minlength=n)
    return unit, offset, t, kept, gap_offset


def _planted_rows(frame: pl.DataFrame, rng: np.random.Generator, quarantine: np.ndarray, rows: int) -> pl.DataFrame:
    """``frame`` with the planted double entries and the rows entered without a key."""
    # Double entry: a few rows (none with the rare flag) repeated right after themselves.
    candidates = np.flatnonzero(quarantine == 0)
    dup_rows = np.sort(rng.choice(candidates, PLANTED["duplicate_rows"], replace=False))
    order = np.sort(np.concatenate([np.arange(rows), dup_rows]), kind="stable")
    frame = frame[order.tolist()]

    # Rows entered without a key: copies of random rows with the id or the season blanked.
    n_null_u, n_null_t = PLANTED["null_unit_rows"], PLANTED["null_season_rows"]
    src = rng.choice(rows, n_null_u + n_null_t, replace=False)
    blank = frame[src.tolist()].with_columns(
        pl.when(pl.int_range(pl.len()) < n_null_u).then(None).otherwise(pl.col("orchard_id")).alias("orchard_id"),
        pl.when(pl.int_range(pl.len()) >= n_null_u).then(None).otherwise(pl.col("season")).alias("season"),
    )
    frame = pl.concat([frame, blank], how="vertical")
    return frame


def make_orchards(seed: int = ORCHARD_SEED) -> pl.DataFrame:
    """The base registry: about 1,200 orchards over the seasons 2017-2024.

    Returns a polars DataFrame with the columns of ``COLUMNS`` (units: mm of
    rainfall per season, irrigation hours per season, labour days per season,
    metres of altitude, years of training, years of tree age), rows ordered by
    orchard id and season, with the faults of ``PLANTED`` in it.
    """
    n = N_ORCHARDS
    tr = _traits(seed, n)
    frost_t, rain_shock_t = _season_effects(seed)
    rng = np.random.default_rng([seed, 3])
    n_seasons = len(SEASONS)

    unit, offset, t, kept, gap_offset = _rows_held(rng, n, n_seasons)
    rows = unit.size

    # Time-varying columns.
    rain = np.maximum(620 + tr["rain_site"][unit] + rain_shock_t[t] + 45 * rng.standard_normal(rows), 50)
    irr = np.maximum(140 + 35 * tr["water"][unit] + 25 * rng.standard_normal(rows), 0)
    labour = np.maximum(np.rint(160 + 18 * tr["u"][unit] + 12 * rng.standard_normal(rows)), 20)
    age = tr["age0"][unit] + t
    rain, irr = np.round(rain, 1), np.round(irr, 1)

    # Organic certification: a few orchards switch 0 -> 1 between their first and last row.
    organic = tr["organic0"][unit].astype(np.int64)
    eligible = np.flatnonzero((~tr["organic0"]) & (kept >= 2) & (gap_offset < 0))
    switchers = rng.choice(eligible, PLANTED["organic_switchers"], replace=False)
    switch_at = np.full(n, np.iinfo(np.int64).max)
    # switch at a row index 1..kept-1 (no gaps here, so offset == row index)
    switch_at[switchers] = 1 + np.floor(rng.random(switchers.size) * (kept[switchers] - 1))
    organic = np.where(offset >= switch_at[unit], 1, organic)

    e = rng.standard_normal(rows)
    y = _outcome(
        rain, irr, labour, tr["altitude"][unit], tr["soil"][unit], tr["training"][unit],
        frost_t[t], age, organic, tr["u"][unit], e,
    )
    y = np.round(y, 4)

    row_start = np.cumsum(kept) - kept  # first row of each orchard

    # The near-constant flag: one quarantine season for a few orchards.
    quarantine = np.zeros(rows, dtype=np.int64)
    q_units = rng.choice(np.flatnonzero(kept >= 2), PLANTED["quarantine_orchards"], replace=False)
    q_rows = row_start[q_units] + np.floor(rng.random(q_units.size) * kept[q_units]).astype(np.int64)
    quarantine[q_rows] = 1

    # The coding error: training typed ten years too high in one later season.
    training = tr["training"][unit].copy()
    err_units = rng.choice(np.flatnonzero(kept >= 3), PLANTED["training_errors"], replace=False)
    err_rows = row_start[err_units] + 1 + np.floor(rng.random(err_units.size) * (kept[err_units] - 1)).astype(np.int64)
    training[err_rows] += 10

    # Missing values at random (labour days and irrigation hours are not always reported).
    labour_f = np.where(rng.random(rows) < BASE_LABOUR_MISSING, np.nan, labour)
    irr_f = np.where(rng.random(rows) < BASE_IRRIGATION_MISSING, np.nan, irr)

    frame = pl.DataFrame(
        {
            "orchard_id": _ids(tr["code"][unit]),
            "season": np.asarray(SEASONS)[t],
            "log_yield_ha": y,
            "rainfall_mm": rain,
            "irrigation_h": irr_f,
            "labour_days": labour_f,
            "altitude_m": tr["altitude"][unit],
            "soil_class": tr["soil"][unit],
            "founder_training_yrs": training,
            "frost_alert": frost_t[t],
            "tree_age": age,
            "organic": organic,
            "quarantine_flag": quarantine,
        }
    ).with_columns(
        pl.col("irrigation_h").fill_nan(None),
        pl.col("labour_days").fill_nan(None).cast(pl.Int64),
    )

    frame = _planted_rows(frame, rng, quarantine, rows)
    return frame.select(COLUMNS)


def make_next_season(
    base: pl.DataFrame, seed: int = NEXT_SEASON_SEED, *, base_seed: int = ORCHARD_SEED
) -> pl.DataFrame:
    """The next-season file (2025) sent after the base registry, with the changes of ``PLANTED_NEXT``.

    ``base`` is the base registry (``make_orchards(base_seed)``); the latent
    traits of its orchards are regenerated from ``base_seed``. Returns a polars
    DataFrame: the base columns without ``quarantine_flag``, plus ``hail_net``
    (0/1, a question first asked this season); rows for 2025 and a few late
    corrections labelled 2024.
    """
    last = SEASONS[-1]
    tr = _traits(base_seed, N_ORCHARDS)
    frost_t, _ = _season_effects(base_seed)
    rng = np.random.default_rng([seed, 4])

    # Orchards in the last base season (clean keys), one row each, in id order.
    last_rows = (
        base.filter((pl.col("season") == last) & pl.col("orchard_id").is_not_null())
        .unique(subset=["orchard_id"], keep="first", maintain_order=True)
        .sort("orchard_id")
    )
    present_codes = last_rows["orchard_id"].str.slice(3).cast(pl.Int64).to_numpy()
    gone = rng.choice(present_codes.size, PLANTED_NEXT["not_returning"], replace=False)
    stay = np.setdiff1d(np.arange(present_codes.size), gone)
    ret_codes = present_codes[stay]
    ret_idx = ret_codes - 1
    ret_organic = last_rows["organic"].to_numpy()[stay]

    n_new = PLANTED_NEXT["entering"]
    new_tr = _traits(seed, n_new, first_code=N_ORCHARDS + 1)

    codes = np.concatenate([ret_codes, new_tr["code"]])
    u = np.concatenate([tr["u"][ret_idx], new_tr["u"]])
    water = np.concatenate([tr["water"][ret_idx], new_tr["water"]])
    altitude = np.concatenate([tr["altitude"][ret_idx], new_tr["altitude"]])
    soil = np.concatenate([tr["soil"][ret_idx], new_tr["soil"]]).astype("<U2")
    soil[ret_codes.size + np.arange(PLANTED_NEXT["new_soil_code"])] = "PT"
    training_true = np.concatenate([tr["training"][ret_idx], new_tr["training"]])
    age = np.concatenate([tr["age0"][ret_idx] + len(SEASONS), new_tr["age0"]])
    organic = np.concatenate([ret_organic, new_tr["organic0"].astype(np.int64)])
    rain_site = np.concatenate([tr["rain_site"][ret_idx], new_tr["rain_site"]])
    rows = codes.size

    frost = np.round(rng.uniform(0.5, 4.5), 1)
    rain = np.maximum(620 + NEXT_RAIN_SHIFT + rain_site + 45 * rng.standard_normal(rows), 50)
    irr = np.maximum(140 + 35 * water + 25 * rng.standard_normal(rows), 0)
    labour = np.maximum(np.rint(160 + 18 * u + 12 * rng.standard_normal(rows)), 20)
    rain, irr = np.round(rain, 1), np.round(irr, 1)
    # the soil effect of the new code is taken as loam's (zero)
    y = _outcome(
        rain, irr, labour, altitude, soil, training_true, np.full(rows, frost), age, organic, u,
        rng.standard_normal(rows),
    )
    y = np.round(y, 4)

    training = training_true.copy()
    changed = rng.choice(ret_codes.size, PLANTED_NEXT["training_changed"], replace=False)
    training[changed] += rng.integers(2, 5, size=changed.size)
    labour_f = np.where(rng.random(rows) < NEXT_LABOUR_MISSING, np.nan, labour)
    hail_net = (rng.random(rows) < 0.2).astype(np.int64)

    new = pl.DataFrame(
        {
            "orchard_id": _ids(codes),
            "season": np.full(rows, NEXT_SEASON),
            "log_yield_ha": y,
            "rainfall_mm": rain,
            "irrigation_h": irr,
            "labour_days": labour_f,
            "altitude_m": altitude,
            "soil_class": soil,
            "founder_training_yrs": training,
            "frost_alert": np.full(rows, frost),
            "tree_age": age,
            "organic": organic,
            "hail_net": hail_net,
        }
    ).with_columns(pl.col("labour_days").fill_nan(None).cast(pl.Int64))

    # Late corrections for the last base season: keys that collide with base rows.
    fix_idx = rng.choice(stay, PLANTED_NEXT["colliding_rows"], replace=False)
    fixes = (
        last_rows[np.sort(fix_idx).tolist()]
        .drop("quarantine_flag")
        .with_columns(
            (pl.col("rainfall_mm") + 12.5).round(1),
            pl.lit(0, dtype=pl.Int64).alias("hail_net"),
        )
    )
    out = pl.concat([fixes.select(new.columns).cast(new.schema), new], how="vertical")
    return out.sort(["orchard_id", "season"], maintain_order=True)


def orchard_files() -> dict[str, pl.DataFrame]:
    """The two shipped example tables by file name: the base registry and the next season."""
    base = make_orchards()
    return {"orchards.csv": base, "orchards_next_season.csv": make_next_season(base)}


def csv_text(frame: pl.DataFrame) -> str:
    """The CSV text written for an example table (missing values as empty fields)."""
    return frame.write_csv(null_value="")


def planted_summary() -> dict[str, Any]:
    """The planted sizes of both files, for the README and the tests."""
    return {"base": dict(PLANTED), "next": dict(PLANTED_NEXT)}
