"""The invented-lake generator: deterministic bytes, contract schemas, normal patients inside
normal ranges, planted cases carrying their pattern, and a manifest that lists every bad row."""
from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from cardiosieve.pipeline import samplegen
from cardiosieve.pipeline.codes import LOINC_CALCIUM_MASS, LOINC_MAGNESIUM_MASS, LOINC_POTASSIUM_SERUM, LOINC_TROPONIN_I_HS
from cardiosieve.pipeline.contract import ALL_LEADS, LIMB_LEADS, PRECORDIAL_LEADS, STANDARD_LEADS
from cardiosieve.pipeline.samplegen import generate

REPO = Path(__file__).resolve().parents[1]
SAMPLE = REPO / "sample_lake"
ALLOWED_LEADS = set(ALL_LEADS)    # the contract's lead list
# The sample site's LOINC codes (docs/references.md).
K, MG, CA, TROP = LOINC_POTASSIUM_SERUM, LOINC_MAGNESIUM_MASS, LOINC_CALCIUM_MASS, LOINC_TROPONIN_I_HS
KNOWN_UNITS = {"mmol/L", "meq/L", "mg/dL", "g/dL", "ng/L"}


def _hashes(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file() and p.name != "README.md"}


def _read(lake: Path, table: str) -> pd.DataFrame:
    """All part-0 files of a table (the planted part-1 files have deliberately broken schemas)."""
    files = sorted(lake.glob(f"{table}/date=*/part-0.parquet"))
    return pd.concat([pq.read_table(f).to_pandas() for f in files], ignore_index=True)


@pytest.fixture(scope="module")
def lake(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("lake")
    generate(out, patients=600, days=20, seed=7)
    return out


@pytest.fixture(scope="module")
def manifest(lake) -> pd.DataFrame:
    return pd.read_csv(lake / "_planted.csv", dtype=str, keep_default_na=False)


@pytest.fixture(scope="module")
def tables(lake) -> dict[str, pd.DataFrame]:
    t = {name: _read(lake, name) for name in ("ecg", "ecg_lead", "lab", "medication")}
    t["patient"] = pq.read_table(lake / "patient" / "part-0.parquet").to_pandas()
    return t


# ---------------------------------------------------------------- determinism and the committed lake
def test_same_seed_gives_byte_identical_files(tmp_path):
    generate(tmp_path / "a", patients=150, days=8, seed=11)
    generate(tmp_path / "b", patients=150, days=8, seed=11)
    generate(tmp_path / "c", patients=150, days=8, seed=12)
    a, b, c = _hashes(tmp_path / "a"), _hashes(tmp_path / "b"), _hashes(tmp_path / "c")
    assert len(a) > 20 and a == b
    assert a != c


def test_regenerating_into_the_same_folder_replaces_old_partitions_and_keeps_readme(tmp_path):
    generate(tmp_path, patients=150, days=12, seed=3)
    (tmp_path / "README.md").write_text("kept")
    generate(tmp_path, patients=150, days=6, seed=3)
    dates = {p.name for p in (tmp_path / "ecg").iterdir()}
    assert len(dates) <= 6 and (tmp_path / "README.md").read_text() == "kept"


def test_committed_sample_lake_equals_a_fresh_default_generation(tmp_path):
    assert (SAMPLE / "_planted.csv").exists(), "sample_lake/ is missing: python -m cardiosieve.pipeline.samplegen --out sample_lake"
    generate(tmp_path)
    assert _hashes(SAMPLE) == _hashes(tmp_path)


def test_committed_sample_lake_is_small():
    # The committed sample stays under 5 MB (a small clone).
    total = sum(p.stat().st_size for p in SAMPLE.rglob("*") if p.is_file())
    assert total < 5_000_000


# ---------------------------------------------------------------- structure
EXPECTED = {
    "ecg": [("ecg_id", "string"), ("patient_id", "string"), ("acquired_at", "timestamp[us, tz=UTC]"),
            ("heart_rate_bpm", "double"), ("rr_ms", "double"), ("pr_ms", "double"), ("qrs_ms", "double"),
            ("qt_ms", "double"), ("p_axis_deg", "double"), ("qrs_axis_deg", "double"), ("t_axis_deg", "double"),
            ("paced", "bool"), ("location", "string")],
    "ecg_lead": [("ecg_id", "string"), ("lead", "string"), ("p_amp_uv", "double"), ("r_amp_uv", "double"),
                 ("s_amp_uv", "double"), ("st_j_uv", "double"), ("t_amp_uv", "double")],
    "lab": [("result_id", "string"), ("patient_id", "string"), ("collected_at", "timestamp[us, tz=UTC]"),
            ("resulted_at", "timestamp[us, tz=UTC]"), ("analyte", "string"), ("value", "double"),
            ("unit", "string"), ("hemolyzed", "bool")],
    "medication": [("patient_id", "string"), ("administered_at", "timestamp[us, tz=UTC]"), ("drug", "string")],
}
MAIN_TS = {"ecg": "acquired_at", "lab": "collected_at", "medication": "administered_at"}


@pytest.mark.parametrize("table", list(EXPECTED))
def test_every_part0_file_has_the_contract_schema_and_sits_in_its_utc_date(lake, table):
    files = sorted(lake.glob(f"{table}/date=*/part-0.parquet"))
    assert len(files) >= 15                      # about one per day of a 20-day lake
    for f in files:
        t = pq.read_table(f)
        assert [(fld.name, str(fld.type)) for fld in t.schema] == EXPECTED[table], f.name
        if table in MAIN_TS:
            day = pd.Series(t.column(MAIN_TS[table]).to_pandas()).dt.strftime("%Y-%m-%d")
            assert set(day) == {f.parent.name.removeprefix("date=")}


def test_patient_table_schema_and_values(lake, tables):
    p = tables["patient"]
    schema = pq.read_schema(lake / "patient" / "part-0.parquet")
    assert [(f.name, str(f.type)) for f in schema] == [("patient_id", "string"), ("sex", "string"),
                                                        ("birth_date", "date32[day]")]
    assert p["patient_id"].is_unique and len(p) == 600
    assert set(p["sex"].dropna()) == {"F", "M"} and 0 < p["sex"].isna().sum() < 60   # "a few null"


def test_lake_window_ids_leads_and_units(tables):
    ecg, leads, lab = tables["ecg"], tables["ecg_lead"], tables["lab"]
    start, end = pd.Timestamp("2026-11-10", tz="UTC"), pd.Timestamp("2026-11-30", tz="UTC")
    assert ecg["acquired_at"].between(start, end, inclusive="left").all()
    assert lab["collected_at"].between(start, end, inclusive="left").all()
    gap_min = (lab["resulted_at"] - lab["collected_at"]).dt.total_seconds() / 60
    assert gap_min.between(30, 121).all()        # sample-lake design: resulted 30-120 min after collection
    assert ecg["ecg_id"].is_unique and lab["result_id"].is_unique
    per_ecg = leads[leads["lead"].isin(STANDARD_LEADS)].groupby("ecg_id")["lead"].nunique()
    assert (per_ecg == 12).all() and set(per_ecg.index) == set(ecg["ecg_id"])
    assert 0.15 < ecg["rr_ms"].isna().mean() < 0.25                       # sample-lake design: about 20 % missing
    k = lab[lab["analyte"] == K]
    assert 0.05 < (k["unit"] == "meq/L").mean() < 0.15                   # sample-lake design: about 10 % in meq/L
    assert set(lab.loc[lab["analyte"].isin([MG, CA]), "unit"]) == {"mg/dL"}
    assert set(lab.loc[lab["analyte"] == TROP, "unit"]) == {"ng/L"}


# ---------------------------------------------------------------- normal patients
def _planted_patients(manifest) -> set:
    return set(manifest["patient_id"])


def test_normal_patients_ecgs_are_inside_normal_ranges(tables, manifest):
    ecg = tables["ecg"][~tables["ecg"]["patient_id"].isin(_planted_patients(manifest))]
    assert len(ecg) > 500
    rr = ecg["rr_ms"].fillna(60000 / ecg["heart_rate_bpm"])
    qtc = ecg["qt_ms"] / (rr / 1000) ** (1 / 3)                          # Fridericia (FRID-1920, docs/references.md)
    assert ecg["heart_rate_bpm"].between(55, 100).all()                  # practice; no bradycardia < 50
    assert ecg["pr_ms"].dropna().between(120, 200).all()                 # practice 120-200 ms
    assert 0 < ecg["pr_ms"].isna().mean() < 0.06                          # AF-like ECGs only
    assert ecg["qrs_ms"].between(80, 110).all()                          # sample-lake design: 80-110 ms
    assert qtc.between(390, 440).all()                                   # sample-lake design: 390-440 ms, below AHA-2009-IV 450/460


def test_normal_patients_leads_are_inside_normal_ranges(tables, manifest):
    planted = _planted_patients(manifest)
    ecg = tables["ecg"][~tables["ecg"]["patient_id"].isin(planted)]
    sex = ecg.merge(tables["patient"], on="patient_id").set_index("ecg_id")["sex"]
    leads = tables["ecg_lead"][tables["ecg_lead"]["ecg_id"].isin(ecg["ecg_id"])]
    std = leads[leads["lead"].isin(STANDARD_LEADS)]
    assert (leads["r_amp_uv"] >= 0).all() and (leads["s_amp_uv"] <= 0).all()   # contract signs
    limb = std[std["lead"].isin(LIMB_LEADS)]
    prec = std[std["lead"].isin(PRECORDIAL_LEADS)]
    assert limb["t_amp_uv"].abs().between(100, 450).all()                # practice; aVR T is negative
    assert prec["t_amp_uv"].between(150, 800).all()                      # below the 1000 uV peaked-T value
    v23_man = std["lead"].isin(["V2", "V3"]) & std["ecg_id"].map(sex).eq("M")
    assert std.loc[~v23_man, "st_j_uv"].between(-40, 40).all()           # practice
    assert std.loc[v23_man, "st_j_uv"].between(-40, 100).all()           # below UDMI-4 200/250 uV for men
    assert leads.loc[~leads["lead"].isin(STANDARD_LEADS), "st_j_uv"].abs().max() < 50   # V3R/V4R/V7-V9 < 0.5 mm
    wide = std.pivot(index="ecg_id", columns="lead", values=["r_amp_uv", "s_amp_uv"])
    sokolow = -wide[("s_amp_uv", "V1")] + np.maximum(wide[("r_amp_uv", "V5")], wide[("r_amp_uv", "V6")])
    assert (sokolow < 3000).all()                                        # below Sokolow-Lyon 3500 uV


def test_normal_patients_labs_meet_no_screen_criterion(tables, manifest):
    lab = tables["lab"][~tables["lab"]["patient_id"].isin(_planted_patients(manifest))]
    assert lab["value"].lt(40).any()   # guard: non-empty selection
    val = lambda code: lab.loc[lab["analyte"] == code, "value"]   # noqa: E731
    assert val(K).between(3.5, 5.4).all()                                # UKKA-2020 mild band starts at 5.5
    assert (val(MG) / 2.4305).between(0.70, 1.05).all()                  # 24.305 g/mol; hypomagnesaemia < 0.70
    assert (val(CA) / 4.008).between(2.10, 2.60).all()                   # 40.078 g/mol; hypocalcaemia < 2.10
    assert val(TROP).lt(26).all()                                        # below the sample site's URL 26 ng/L


def test_normal_patients_get_at_most_one_distinct_qt_drug(tables, manifest):
    qt_drugs = set(samplegen.QT_DRUGS)
    med = tables["medication"]
    med = med[~med["patient_id"].isin(_planted_patients(manifest)) & med["drug"].isin(qt_drugs)]
    assert len(med) > 0 and med.groupby("patient_id")["drug"].nunique().max() == 1


# ---------------------------------------------------------------- planted cases
def test_each_abnormal_kind_plants_3_to_5_percent_of_patients(manifest):
    cases = manifest[manifest["record"] == "case"]
    for kind in ("hyperkalemia", "long_qt", "st_deviation"):
        share = cases.loc[cases["kind"] == kind, "patient_id"].nunique() / 600
        assert 0.03 <= share <= 0.05, kind                                # sample-lake design: 3-5 % per kind
    assert cases.groupby("patient_id")["kind"].nunique().max() == 1      # one kind per patient


def test_every_kind_has_cases_on_the_last_night(manifest):
    last = manifest[(manifest["record"] == "case") & (manifest["date"] == "2026-11-29")]
    assert set(last["kind"]) == {"hyperkalemia", "long_qt", "st_deviation", "normal"}
    assert len(last) >= 30


def _closest(ecg: pd.DataFrame, lab: pd.DataFrame, code: str) -> pd.Series:
    """Closest result of `code` collected in [acquired_at - 24 h, acquired_at + 6 h] (the default lab window)."""
    m = ecg[["ecg_id", "patient_id", "acquired_at"]].merge(lab[lab["analyte"] == code], on="patient_id")
    off = (m["collected_at"] - m["acquired_at"]).dt.total_seconds() / 3600
    m = m[off.between(-24, 6)].assign(gap=off.abs())
    return m.sort_values("gap").drop_duplicates("ecg_id").set_index("ecg_id")["value"]


def test_planted_hyperkalemia_cases_have_their_potassium(tables, manifest):
    cases = manifest[(manifest["kind"] == "hyperkalemia")]
    ecg = tables["ecg"][tables["ecg"]["ecg_id"].isin(cases["ecg_id"])]
    k = _closest(ecg, tables["lab"], K)
    no_k = cases.loc[cases["detail"].str.contains("no potassium in window"), "ecg_id"]
    assert len(no_k) > 0 and not k.index.isin(no_k).any()
    with_k = cases.loc[~cases["ecg_id"].isin(no_k), "ecg_id"]
    assert k.reindex(with_k).ge(5.5).all()                                # UKKA-2020 mild band
    bands = pd.cut(k, [5.5, 6.0, 6.5, 99], right=False).value_counts()
    assert (bands > 0).all()                                             # 5.5-5.9, 6.0-6.4, >= 6.5 all present
    signs = ecg.set_index("ecg_id").loc[no_k]
    assert (signs["qrs_ms"] >= 120).all() and (signs["heart_rate_bpm"] < 50).all()


def test_only_the_haemolysed_variant_reports_a_haemolysed_high_potassium(tables, manifest):
    cases = manifest[manifest["kind"] == "hyperkalemia"]
    ecg = tables["ecg"][tables["ecg"]["ecg_id"].isin(cases["ecg_id"])]
    lab = tables["lab"].assign(value=tables["lab"]["hemolyzed"].astype(float))   # reuse _closest on the flag
    flag = _closest(ecg, lab, K)
    haem = cases.loc[cases["detail"].str.startswith("haemolysed"), "ecg_id"]
    assert len(haem) > 0 and flag.reindex(haem).eq(1).all()
    assert flag.drop(haem, errors="ignore").eq(0).all()


def _drugs_24h_before(tables, ecg_ids, drugs):
    """Distinct `drugs` given in [acquired_at - 24 h, acquired_at) per ECG (the medication window)."""
    ecg = tables["ecg"][tables["ecg"]["ecg_id"].isin(ecg_ids)]
    m = ecg.merge(tables["medication"][tables["medication"]["drug"].isin(drugs)], on="patient_id")
    before = m["acquired_at"] - m["administered_at"]
    m = m[(before > pd.Timedelta(0)) & (before <= pd.Timedelta(hours=24))]
    return m.groupby("ecg_id")["drug"].nunique().reindex(ecg["ecg_id"], fill_value=0)


def test_planted_older_women_on_qt_drugs_meet_the_tisdale_factors(tables, manifest):
    ids = manifest.loc[manifest["detail"].str.startswith("woman >= 68 y"), "ecg_id"]
    ecg = tables["ecg"][tables["ecg"]["ecg_id"].isin(ids)].merge(tables["patient"], on="patient_id")
    age = (ecg["acquired_at"].dt.tz_localize(None) - pd.to_datetime(ecg["birth_date"])).dt.days / 365.25
    assert len(ecg) > 0 and ecg["sex"].eq("F").all() and (age >= 68).all()   # Tisdale-2013: age >= 68, female
    n_qt = _drugs_24h_before(tables, ids, samplegen.QT_DRUGS)
    assert n_qt.ge(1).all() and n_qt.eq(2).any()                         # one drug 3 points, two or more 6


def test_planted_binder_cases_received_a_potassium_lowering_drug(tables, manifest):
    ids = manifest.loc[manifest["detail"].str.contains("potassium binder"), "ecg_id"]
    assert len(ids) > 0 and _drugs_24h_before(tables, ids, samplegen.K_LOWERING).ge(1).all()


def test_planted_long_qt_cases_exceed_their_sex_limit(tables, manifest):
    cases = manifest[manifest["kind"] == "long_qt"]
    ecg = tables["ecg"].merge(tables["patient"], on="patient_id")
    ecg = ecg[ecg["ecg_id"].isin(cases["ecg_id"])]
    rr = ecg["rr_ms"].fillna(60000 / ecg["heart_rate_bpm"])
    qtc = ecg["qt_ms"] / (rr / 1000) ** (1 / 3)                          # Fridericia
    limit = np.where(ecg["sex"].eq("F"), 460, 450)                        # AHA-2009-IV
    assert (qtc >= limit).all()
    assert (qtc > 500).any()                                             # AHA-2010-TDP high risk present


def _st(leads, ecg_ids, names):
    s = leads[leads["ecg_id"].isin(ecg_ids) & leads["lead"].isin(names)]
    return s.pivot(index="ecg_id", columns="lead", values="st_j_uv")


def test_planted_st_cases_show_their_territory(tables, manifest):
    cases = manifest[(manifest["kind"] == "st_deviation") & (manifest["expect_finding"] == "true")]
    leads = tables["ecg_lead"]
    # UDMI-4: >= 100 uV in two contiguous leads (V2-V3 planted >= 260 uV, above every sex/age limit).
    groups = {"inferior": ["II", "III", "aVF"], "anterior": ["V1", "V2", "V3", "V4"],
              "lateral": ["I", "aVL", "V5", "V6"], "right_ventricular": ["V3R", "V4R"]}
    for territory, names in groups.items():
        ids = cases.loc[cases["expect_territories"].str.split(",").apply(lambda t: territory in t), "ecg_id"]
        assert len(ids) > 0, territory
        st = _st(leads, ids, names)
        assert ((st >= 100).sum(axis=1) >= 2).all(), territory
    post = cases.loc[cases["expect_territories"] == "posterior", "ecg_id"]
    st = _st(leads, post, ["V1", "V2", "V3"])
    assert ((st <= -50).sum(axis=1) >= 2).all()                           # UDMI-4 depression >= 0.5 mm


def test_planted_lbbb_without_concordance_is_sgarbossa_negative(tables, manifest):
    ids = manifest.loc[manifest["detail"].str.contains("Sgarbossa-negative"), "ecg_id"]
    assert len(ids) > 0 and (manifest.loc[ids.index, "expect_finding"] == "false").all()
    ecg = tables["ecg"].set_index("ecg_id").loc[ids]
    assert (ecg["qrs_ms"] >= 140).all()
    v = tables["ecg_lead"]
    v = v[v["ecg_id"].isin(ids) & v["lead"].isin(["V1", "V2", "V3"])]
    assert (v["st_j_uv"] >= 100).any()                                    # would fool a plain UDMI rule
    assert (v["st_j_uv"] < 500).all()                                     # Sgarbossa 1996: discordant < 5 mm
    assert (v["st_j_uv"] / v["s_amp_uv"] > -0.25).all()                   # Smith 2012 ratio not met


def test_persistent_elevation_lists_the_prior_ecg_too(tables, manifest):
    prior = manifest[manifest["detail"].str.startswith("prior ECG of a persistent")]
    index = manifest[manifest["detail"] == "anterior elevation already on the prior ECG"]
    assert len(prior) == len(index) > 0
    assert set(prior["patient_id"]) == set(index["patient_id"])


# ---------------------------------------------------------------- planted bad rows
def test_manifest_lists_every_planted_bad_row_and_each_is_in_its_file(lake, manifest):
    bad = manifest[manifest["record"] == "bad_row"]
    assert set(bad["reason"]) == {"unknown_unit", "naive_timestamp", "duplicate_id", "impossible_value",
                                  "unknown_lead", "wrong_type"}
    assert (bad["date"] == "2026-11-29").sum() >= 4                      # several on the last night
    for row in bad.itertuples():
        t = pq.read_table(lake / row.file)
        key = {"ecg": "ecg_id", "lab": "result_id"}.get(row.table)
        if row.table == "ecg_lead":
            ecg_id, lead = row.row_key.split("|")
            hit = t.to_pandas().query("ecg_id == @ecg_id and lead == @lead")
        else:
            hit = t.to_pandas().loc[lambda d: d[key] == row.row_key]
        assert len(hit) == 1, row.row_key
        value = hit.iloc[0][row.column]
        if row.reason == "unknown_unit":
            assert value not in KNOWN_UNITS
        elif row.reason == "impossible_value":
            assert value in (0.0, 900.0, 45.0)
        elif row.reason == "unknown_lead":
            assert value not in ALLOWED_LEADS
        elif row.reason == "naive_timestamp":
            assert t.schema.field(row.column).type == pa.timestamp("us")
        elif row.reason == "wrong_type":
            assert t.schema.field(row.column).type == pa.string()
            assert pd.to_numeric(pd.Series([value]), errors="coerce").isna().all()
        elif row.reason == "duplicate_id":
            other = pq.read_table(lake / row.file.replace("part-1", "part-0")).to_pandas()
            assert (other["ecg_id"] == row.row_key).sum() == 1


def test_nothing_bad_is_left_out_of_the_manifest(lake, tables, manifest):
    bad = manifest[manifest["record"] == "bad_row"]
    extra_files = {str(p.relative_to(lake)) for p in lake.glob("*/date=*/part-[1-9]*.parquet")}
    assert extra_files == {f for f in bad["file"] if not f.endswith("part-0.parquet")}
    ecg, leads, lab = tables["ecg"], tables["ecg_lead"], tables["lab"]
    odd_qrs = set(ecg.loc[~ecg["qrs_ms"].between(40, 300), "ecg_id"])
    assert odd_qrs == set(bad.loc[bad["column"] == "qrs_ms", "row_key"])
    odd = leads[~leads["lead"].isin(ALLOWED_LEADS)]
    odd_lead = set(odd["ecg_id"] + "|" + odd["lead"])
    assert odd_lead == set(bad.loc[bad["reason"] == "unknown_lead", "row_key"])
    odd_lab = set(lab.loc[~lab["unit"].isin(KNOWN_UNITS) | (lab["analyte"].eq(K) & lab["value"].gt(20)), "result_id"])
    assert odd_lab == set(bad.loc[(bad["table"] == "lab") & bad["file"].str.endswith("part-0.parquet"), "row_key"])


def test_bad_rows_can_be_left_out(tmp_path):
    counts = generate(tmp_path, patients=150, days=8, seed=5, plant_bad_rows=False)
    m = pd.read_csv(tmp_path / "_planted.csv", dtype=str, keep_default_na=False)
    assert counts["planted_bad_rows"] == 0 and (m["record"] == "case").all()
    assert not list(tmp_path.glob("*/date=*/part-1.parquet"))


def test_cli_writes_a_lake(tmp_path):
    assert samplegen.main(["--out", str(tmp_path), "--patients", "120", "--days", "6", "--seed", "9"]) == 0
    assert (tmp_path / "site.toml").exists() and list(tmp_path.glob("ecg/date=*/part-0.parquet"))
