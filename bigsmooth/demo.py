"""The bundled demo: a synthetic nightly tenancy pre-screen of a fictional housing co-operative.

"Fernbrook Mutual Housing" scores every applicant on its waiting list each night for the chance that
a tenancy would be sustained for a year. The score comes from a model that never saw the protected
attributes but learned them anyway through proxies (the applicant's current postcode sector and a
"years at current address" field), so two applicants with the same finances and history get
different scores depending on their origin group and age band. All names and numbers here are
invented by this module; nothing is real data.
"""

import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import atomic

DISTRICTS = ("ashgrove", "millbank", "quayside", "thornfield", "westlea")
SECTORS = tuple(f"FM{i:02d}" for i in range(12))
EMPLOYMENT = ("salaried", "hourly", "self_employed", "student", "retired", "not_working")
HOUSEHOLD = ("single", "couple", "family", "shared")
ORIGIN = ("group_a", "group_b", "group_c")
AGE_BAND = ("18-29", "30-49", "50+")

NUMERIC = (
    "monthly_income",
    "income_months_stable",
    "rent_to_income",
    "prior_tenancies",
    "arrears_months",
    "household_size",
    "references",
    "years_at_address",
    "savings_months",
    "debt_to_income",
)
CATEGORICAL = ("employment", "household", "postcode_sector")
PROTECTED = ("origin_group", "age_band")


def generate(n_rows, seed=0):
    """Return a dict of column arrays for ``n_rows`` synthetic applicants (deterministic in ``seed``)."""
    rng = np.random.default_rng(seed)
    n = int(n_rows)
    origin = rng.choice(3, size=n, p=[0.6, 0.25, 0.15])
    age = rng.choice(3, size=n, p=[0.3, 0.45, 0.25])
    district = rng.choice(len(DISTRICTS), size=n)
    # postcode sector: a proxy for origin group (groups b and c concentrated in a few sectors)
    sector_p = np.array(
        [
            np.r_[np.full(8, 0.11), np.full(4, 0.03)],
            np.r_[np.full(8, 0.02), np.full(4, 0.21)],
            np.r_[np.full(8, 0.03), np.full(4, 0.19)],
        ]
    )
    sector_p /= sector_p.sum(axis=1, keepdims=True)
    cum = np.cumsum(sector_p[origin], axis=1)
    sector = (rng.random(n)[:, None] > cum).sum(axis=1).clip(0, len(SECTORS) - 1)
    employment = rng.choice(len(EMPLOYMENT), size=n, p=[0.42, 0.25, 0.1, 0.06, 0.1, 0.07])
    household = rng.choice(len(HOUSEHOLD), size=n, p=[0.35, 0.25, 0.3, 0.1])
    income = np.exp(rng.normal(7.6, 0.45, n)) * np.where(employment == 3, 0.5, 1.0)
    stable = rng.gamma(2.0, 14.0, n).round()
    rent_ratio = np.clip(rng.normal(0.33, 0.08, n), 0.1, 0.8)
    prior = rng.poisson(1.2 + age, n).astype(np.float64)
    arrears = rng.poisson(0.4, n).astype(np.float64)
    hh_size = np.where(
        household == 2,
        2 + rng.poisson(1.4, n),
        np.where(household == 1, 2, 1 + (household == 3) * rng.poisson(1.5, n)),
    ).astype(np.float64)
    refs = rng.integers(0, 4, n).astype(np.float64)
    # years at address: a proxy for age band
    years_addr = np.round(rng.gamma(1.5 + 1.5 * age, 1.6, n), 1)
    savings = np.round(rng.exponential(1.5, n), 2)
    dti = np.clip(rng.normal(0.25, 0.12, n), 0.0, 1.5)

    legit = (
        0.9 * (np.log(income) - 7.6)
        + 0.02 * (stable - 28)
        - 4.0 * (rent_ratio - 0.33)
        - 0.7 * arrears
        + 0.25 * refs
        + 0.15 * savings
        - 1.2 * (dti - 0.25)
        + 0.1 * prior
    )
    # the true outcome depends on the legitimate factors only
    p_true = 1 / (1 + np.exp(-(0.6 + legit)))
    outcome = (rng.random(n) < p_true).astype(np.int8)
    # the deployed model leaks the protected attributes through the proxies
    proxy = -0.9 * (sector >= 8) + 0.12 * (years_addr - 3.5)
    logit = 0.5 + legit + proxy + rng.normal(0, 0.25, n)
    score = 1 / (1 + np.exp(-logit))
    ids = 1_000_000 + rng.permutation(n).astype(np.int64) * 7 + 3
    labelled = rng.random(n) < 0.4
    return {
        "applicant_id": ids,
        "district": np.array(DISTRICTS)[district],
        "sustain_score": score,
        "monthly_income": np.round(income, 2),
        "income_months_stable": stable,
        "rent_to_income": np.round(rent_ratio, 4),
        "prior_tenancies": prior,
        "arrears_months": arrears,
        "household_size": hh_size,
        "references": refs,
        "years_at_address": years_addr,
        "savings_months": savings,
        "debt_to_income": np.round(dti, 4),
        "employment": np.array(EMPLOYMENT)[employment],
        "household": np.array(HOUSEHOLD)[household],
        "postcode_sector": np.array(SECTORS)[sector],
        "origin_group": np.array(ORIGIN)[origin],
        "age_band": np.array(AGE_BAND)[age],
        "sustained_12m": pa.array(outcome, mask=~labelled),
    }


def write_demo_table(folder, n_rows, seed=0, rows_per_file=50_000):
    """Write the synthetic table as hive-partitioned Parquet (district=<name>/part-<i>.parquet)."""
    cols = generate(n_rows, seed)
    district = cols.pop("district")
    table = pa.table({k: (v if isinstance(v, pa.Array) else pa.array(v)) for k, v in cols.items()})
    return _write_districts(folder, table, np.asarray(district), rows_per_file)


NEXT_NIGHT = {"removed": 0.02, "added": 0.02, "rescored": 0.10, "rescore_sd": 0.05}


def next_night(folder, night, seed=0, rows_per_file=50_000):
    """Turn the demo table under ``folder`` into the next night's (``night`` = 2, 3, ...): 2% of the
    applicants leave, 2% new ones arrive (new ids), and 10% of those who stay are re-scored (their
    score moves by a normal step of sd 0.05, kept in [0, 1]); every other row is unchanged. The
    new table is written beside the old one and swapped in. Returns the counts."""
    import pyarrow.compute as pc
    import pyarrow.dataset as ds
    import shutil

    table = ds.dataset(folder, format="parquet", partitioning="hive").to_table()
    table = table.sort_by("applicant_id")
    n = table.num_rows
    rng = np.random.default_rng([seed, night])
    keep = rng.random(n) >= NEXT_NIGHT["removed"]
    table = table.filter(pa.array(keep))
    score = table.column("sustain_score").to_numpy().copy()
    moved = rng.random(len(score)) < NEXT_NIGHT["rescored"]
    score[moved] = np.clip(score[moved] + rng.normal(0, NEXT_NIGHT["rescore_sd"], int(moved.sum())), 0, 1)
    table = table.set_column(table.column_names.index("sustain_score"), "sustain_score", pa.array(score))
    n_new = int(round(n * NEXT_NIGHT["added"]))
    new = generate(n_new, seed=seed * 1000 + night)
    new["applicant_id"] = int(pc.max(table.column("applicant_id")).as_py()) + 1 + np.arange(n_new)
    new_table = pa.table({k: (v if isinstance(v, pa.Array) else pa.array(v)) for k, v in new.items()})
    district = np.concatenate(
        [table.column("district").to_numpy(zero_copy_only=False).astype(str), new.pop("district")]
    )
    cols = [c for c in table.column_names if c != "district"]
    both = pa.concat_tables([table.select(cols), new_table.select(cols).cast(table.select(cols).schema)])
    staging = folder.rstrip(os.sep) + ".next"
    shutil.rmtree(staging, ignore_errors=True)
    _write_districts(staging, both, district, rows_per_file)
    old = folder.rstrip(os.sep) + ".old"
    shutil.rmtree(old, ignore_errors=True)
    os.rename(folder, old)
    os.rename(staging, folder)
    shutil.rmtree(old, ignore_errors=True)
    return {
        "removed": int((~keep).sum()),
        "added": n_new,
        "rescored": int(moved.sum()),
        "rows": both.num_rows,
    }


def _write_districts(folder, table, district, rows_per_file):
    os.makedirs(folder, exist_ok=True)
    written = 0
    for d in DISTRICTS:
        part = table.filter(pa.array(district == d))
        sub = os.path.join(folder, f"district={d}")
        for i, start in enumerate(range(0, max(part.num_rows, 1), rows_per_file)):
            piece = part.slice(start, rows_per_file)
            if piece.num_rows == 0:
                continue
            with atomic.atomic_path(os.path.join(sub, f"part-{i:03d}.parquet")) as tmp:
                pq.write_table(piece, tmp)
            written += piece.num_rows
    return written


CONFIG_TEMPLATE = """\
# bigsmooth config for the bundled demo: Fernbrook Mutual Housing's nightly tenancy pre-screen
# (synthetic data generated by `bigsmooth demo`). Paths are relative to this file.

[input]
path = "{data}"
id = "applicant_id"
scores = ["sustain_score"]
score_range = [0.0, 1.0]
numeric_features = ["monthly_income", "income_months_stable", "rent_to_income", "prior_tenancies",
                    "arrears_months", "household_size", "references", "years_at_address",
                    "savings_months", "debt_to_income"]
categorical_features = ["employment", "household", "postcode_sector"]
protected = ["origin_group", "age_band"]
label = "sustained_12m"

[embed]
remove_sensitive = true
components = 0

[graph]
neighbours = 10
kernel_scale = "global"

[solve]
laplacian = "unnormalised"
lam = 1.0
method = "sweep-cg"
tol = 1e-6

[output]
path = "{output}"

[audit]
select_rate = 0.3
report_note = "Demo: every row is synthetic, generated by `bigsmooth demo`; no real person is scored."

[run]
dir = "{runs}"
seed = 0
"""


def write_demo_config(path, data, output, runs):
    text = CONFIG_TEMPLATE.format(data=data, output=output, runs=runs)
    atomic.write_bytes(path, text.encode())
    return path
