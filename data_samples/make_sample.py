"""Generate the leanset demo table: pump inspections at a fictional water co-op.

Scenario (invented): the "Verdant Basin Water Co-op" runs irrigation pumps at
eight sites in four regions; each row is one inspection of one pump. Columns:
inspection_id (unique, "INS-000123"), site, region, pump_model (strings),
night_shift (bool), float32 sensors vibration_rms, discharge_pressure_bar, flow_lpm,
motor_temp_c, current_a, run_hours, days_since_service, and the label `fault`:
ok 70%, bearing_wear 14%, seal_leak 9%, impeller_clog 5%, motor_overheat 2% before
label flips (about 68 / 14 / 9 / 6 / 3% after). Faults shift readings off each
model's nominal values: bearing wear raises vibration (more for some models and
older pumps), seal leaks drop pressure (more the longer since service), clogs cut
flow and raise current, overheating raises temperature (worse when hot, by day).

Injected defects, for --rows 20000 (counts scale with --rows):
  * near-redundant easy rows: 5400 (27%) `ok` rows, ~0.3% jitters of six prototypes;
  * exact duplicates: 300 (1.5%) rows copy another row except its unique inspection_id;
  * flipped labels: 600 (3%) non-duplicate rows get a label drawn uniformly from the
    other classes, before duplication (so a few duplicates copy a flipped label);
  * missing values (non-prototype rows only): 3% / 4% / 5% NaN in vibration_rms /
    motor_temp_c / days_since_service.
Nothing in the table marks defective rows. --truth PATH writes a side CSV with, per
inspection_id: true_fault, prototype (-1 if none), label_flipped, duplicate_of.

Regenerate:  python data_samples/make_sample.py [--rows N] [--seed S] [--out P]
"""
import argparse
import os
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

CLASSES = ["ok", "bearing_wear", "seal_leak", "impeller_clog", "motor_overheat"]
SHARES = np.array([0.70, 0.14, 0.09, 0.05, 0.02])
SITES = {"Alder Ford": "north_terrace", "Brackenmoor": "north_terrace", "Harrowmere": "upper_mesa",
         "Cressy Bend": "river_flats", "Dunmarrow Weir": "river_flats",
         "Elsketh Flats": "river_flats", "Fenwillow": "south_delta", "Gorse Hollow": "south_delta"}
REGION_AMBIENT_C = {"north_terrace": 14.0, "river_flats": 20.0,
                    "south_delta": 26.0, "upper_mesa": 17.0}
# pump_model: nominal (vibration_rms, pressure_bar, flow_lpm, current_a), bearing sensitivity
MODELS = {"VB-110": ((1.8, 3.2, 900, 18), 1.0), "VB-220": ((2.2, 4.5, 1400, 27), 0.5),
          "TQ-3X": ((1.5, 2.6, 650, 12), 1.5), "RM-450": ((2.8, 5.8, 2100, 40), 0.8)}
PROTO_SHARE, DUP_SHARE, FLIP_SHARE = 0.27, 0.015, 0.03
SENSORS = ["vibration_rms", "discharge_pressure_bar", "flow_lpm", "motor_temp_c",
           "current_a", "run_hours", "days_since_service"]
MISSING = {"vibration_rms": 0.03, "motor_temp_c": 0.04, "days_since_service": 0.05}


def simulate(rng, labels):
    """Draw context and sensor readings for the given integer fault labels."""
    n = len(labels)
    site = rng.choice(list(SITES), n)
    region = np.array([SITES[s] for s in site])
    model = rng.choice(list(MODELS), n, p=[0.35, 0.3, 0.2, 0.15])
    nominal = np.array([MODELS[m][0] for m in model])
    sens = np.array([MODELS[m][1] for m in model])
    night = rng.random(n) < 0.35
    run_hours = rng.gamma(2.0, 6000.0, n)
    days = rng.gamma(2.0, 60.0, n)
    is_ = [labels == k for k in range(len(CLASSES))]
    age = run_hours / 12000.0
    log_vib = 0.15 * rng.standard_normal(n) + 0.08 * age + is_[1] * 0.35 * sens * (0.4 + 0.6 * age)
    log_pres = 0.06 * rng.standard_normal(n) - is_[2] * (0.10 + 0.0006 * days) + is_[3] * 0.05
    log_flow = 0.06 * rng.standard_normal(n) - is_[2] * 0.06 - is_[3] * 0.20
    log_cur = 0.04 * rng.standard_normal(n) + is_[3] * 0.09 + is_[4] * 0.10 + is_[1] * 0.03
    ambient = np.array([REGION_AMBIENT_C[r] for r in region]) - 5.0 * night
    temp = (ambient + 35.0 + 2.0 * age + 3.6 * rng.standard_normal(n)
            + is_[4] * (10.0 + 0.5 * (ambient - 15.0)) + is_[1] * 3.0)
    days = days + is_[2] * rng.gamma(2.0, 30.0, n)
    vib, pres, flow, cur = (nominal * np.exp(np.c_[log_vib, log_pres, log_flow, log_cur])).T
    return pd.DataFrame({
        "site": site, "region": region, "pump_model": model, "night_shift": night,
        "vibration_rms": vib, "discharge_pressure_bar": pres, "flow_lpm": flow,
        "motor_temp_c": temp, "current_a": cur, "run_hours": run_hours,
        "days_since_service": days, "fault": labels})


def build(rows, rng, n_protos=6):
    """Return (table, truth): all defects injected, rows shuffled, ids assigned."""
    n_proto, n_dup, n_flip = (round(rows * s) for s in (PROTO_SHARE, DUP_SHARE, FLIP_SHARE))
    n_base = rows - n_dup
    # organic class mix chosen so that organic rows + prototype block hit SHARES overall
    p = SHARES * rows / n_base
    p[0] -= n_proto / n_base
    organic = simulate(rng, rng.choice(len(CLASSES), n_base - n_proto, p=p / p.sum()))
    for col, rate in MISSING.items():
        organic.loc[rng.random(len(organic)) < rate, col] = np.nan
    # near-redundant block: tiny multiplicative jitters of a few healthy prototypes
    proto_of = rng.integers(0, n_protos, n_proto)
    block = simulate(rng, np.zeros(n_protos, dtype=int)).iloc[proto_of].reset_index(drop=True)
    block[SENSORS] *= 1.0 + 0.003 * rng.standard_normal((n_proto, len(SENSORS)))
    base = pd.concat([organic, block], ignore_index=True)
    truth = pd.DataFrame({"true_fault": base["fault"],
                          "prototype": np.r_[np.full(len(organic), -1), proto_of]})
    flip = rng.choice(n_base, n_flip, replace=False)
    shift = rng.integers(1, len(CLASSES), n_flip)  # uniform over the other classes
    base.loc[flip, "fault"] = (base.loc[flip, "fault"] + shift) % len(CLASSES)
    src = rng.choice(n_base, n_dup, replace=False)
    table = pd.concat([base, base.iloc[src]], ignore_index=True)
    truth = pd.concat([truth, truth.iloc[src]], ignore_index=True)
    truth["label_flipped"] = table["fault"] != truth["true_fault"]
    new_pos = np.empty(rows, dtype=int)
    new_pos[rng.permutation(rows)] = np.arange(rows)  # row i moves to position new_pos[i]
    ids = np.array([f"INS-{k:06d}" for k in new_pos])
    truth["duplicate_of"] = np.r_[np.full(n_base, ""), ids[src]]
    table.insert(0, "inspection_id", ids)
    truth.insert(0, "inspection_id", ids)
    table["fault"] = np.array(CLASSES)[table["fault"]]
    truth["true_fault"] = np.array(CLASSES)[truth["true_fault"]]
    table[SENSORS] = table[SENSORS].astype("float32")
    order = np.argsort(new_pos)
    return table.iloc[order].reset_index(drop=True), truth.iloc[order].reset_index(drop=True)


def atomic_write(path, write):
    """Call write(tmp_path) on a temp file next to path, then rename it into place."""
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    os.close(fd)
    try:
        write(tmp)
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        os.unlink(tmp)
        raise


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=20000)
    ap.add_argument("--seed", type=int, default=7)
    here = Path(__file__).resolve().parent
    ap.add_argument("--out", type=Path, default=here / "pump_faults.parquet")
    ap.add_argument("--truth", type=Path, help="optional side CSV recording the injected defects")
    args = ap.parse_args()
    table, truth = build(args.rows, np.random.default_rng(args.seed))
    arrow = pa.Table.from_pandas(table, preserve_index=False)
    arrow = arrow.cast(pa.schema([f.with_type(pa.string()) if f.type == pa.large_string() else f
                                  for f in arrow.schema]))  # plain string, not large_string
    atomic_write(args.out, lambda tmp: pq.write_table(
        arrow, tmp, compression="zstd", use_dictionary=["site", "region", "pump_model", "fault"]))
    if args.truth:
        atomic_write(args.truth, lambda tmp: truth.to_csv(tmp, index=False))
    dup, shares = truth.duplicate_of != "", table["fault"].value_counts(normalize=True)
    print(f"wrote {args.out.name}: {len(table)} rows, {args.out.stat().st_size / 1e6:.2f} MB; "
          f"{(~dup & (truth.prototype >= 0)).sum()} prototype-jitter ok rows, {dup.sum()} exact "
          f"duplicates, {(~dup & truth.label_flipped).sum()} flipped labels; "
          + ", ".join(f"{c} {shares[c]:.1%}" for c in CLASSES))


if __name__ == "__main__":
    main()
