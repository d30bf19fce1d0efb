"""Write a synthetic extract: chunks of persons streamed into one Parquet file per table."""

from __future__ import annotations

import json
import queue
import shutil
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from synthetic import _params as P
from synthetic._chunk import EPOCH_US, Ids, _day, _ts, generate_chunk
from synthetic._labcodes import CodeTable
from synthetic._people import GROUP_NAMES, MIMIC_KINDS, SEVERITY_NAMES
from synthetic._schema import SCHEMAS, Masked, Str, make_table
from synthetic._truth import effects_json, truth_readme
from synthetic._vocab import CONCEPT_ID, CONCEPTS, KETONE_ANSWERS, VALID_END, VALID_START, ancestor_rows, cid

__all__ = ["SynthError", "SynthSummary", "generate_extract"]


class SynthError(ValueError):
    """A bad argument to the synthetic-extract generator (what was expected, found, and the fix)."""


@dataclass(frozen=True)
class SynthSummary:
    """What :func:`generate_extract` wrote."""

    extract_dir: Path
    truth_dir: Path
    persons: int
    measurement_rows: int
    rows_per_table: dict[str, int] = field(default_factory=dict)
    seconds: float = 0.0


FAULT_KINDS = (
    "glucose_mg_dl_rows", "bhb_mg_dl_rows", "missing_unit_rows", "duplicate_rows",
    "decimal_slip_ph_rows", "date_only_rows", "after_death_rows", "ordinal_urine_ketone_rows",
    "icd_missed_episodes", "icd_false_label_visits",
)


class _Writers:
    """One ParquetWriter per table; writes run on a background thread (FIFO, so deterministic).

    pyarrow releases the GIL while it encodes and compresses, so writing chunk k overlaps with
    generating chunk k + 1. The queue is bounded so at most a few tables wait in memory.
    """

    def __init__(self, folder: Path, schemas: dict[str, pa.Schema], *, store_schema: bool = True) -> None:
        self.folder = folder
        self.schemas = schemas
        self.store_schema = store_schema
        self.writers: dict[str, pq.ParquetWriter] = {}
        self.rows: dict[str, int] = {name: 0 for name in schemas}
        self._queue: queue.Queue = queue.Queue(maxsize=12)
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name="synth-parquet-writer", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while True:
            item = self._queue.get()
            if item is None:
                return
            if self._error is not None:
                continue
            try:
                self._write_now(*item)
            except BaseException as exc:  # re-raised in the main thread
                self._error = exc

    def write(self, name: str, table: pa.Table) -> None:
        if table.num_rows == 0:
            return
        if self._error is not None:
            raise self._error
        self.rows[name] += table.num_rows
        self._queue.put((name, table))

    def _write_now(self, name: str, table: pa.Table) -> None:
        w = self.writers.get(name)
        if w is None:
            # the first table fixes the in-memory schema (dictionary-encoded string columns);
            # without the Arrow schema in the file, readers see the plain CDM types
            w = pq.ParquetWriter(self.folder / f"{name}.parquet", table.schema, compression="zstd",
                                 store_schema=self.store_schema)
            self.writers[name] = w
        w.write_table(table, row_group_size=max(table.num_rows, 1))

    def close(self) -> None:
        self._queue.put(None)
        self._thread.join()
        if self._error is not None:
            raise self._error
        for name, schema in self.schemas.items():
            if name in self.writers:
                self.writers[name].close()
            else:
                pq.write_table(schema.empty_table(), self.folder / f"{name}.parquet", compression="zstd",
                               store_schema=self.store_schema)


def _check_args(persons: object, seed: object, out: object, force: bool, chunk_persons: object) -> Path:
    if isinstance(persons, bool) or not isinstance(persons, (int, np.integer)) or persons <= 0:
        raise SynthError(f"persons must be a whole number greater than 0, got {persons!r}; pass e.g. persons=5000")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise SynthError(f"seed must be a whole number of 0 or more, got {seed!r}")
    if isinstance(chunk_persons, bool) or not isinstance(chunk_persons, (int, np.integer)) or chunk_persons <= 0:
        raise SynthError(f"chunk_persons must be a whole number greater than 0, got {chunk_persons!r}")
    try:
        out = Path(out)  # type: ignore[arg-type]
    except TypeError:
        raise SynthError(f"out must be a folder path, got {out!r}") from None
    if out.exists() and not out.is_dir():
        raise SynthError(f"output folder {out} exists and is a file, not a folder; choose another --out")
    if out.exists() and any(out.iterdir()):
        if not force:
            raise SynthError(f"output folder {out} is not empty; pass --force to replace it")
    try:
        out.mkdir(parents=True, exist_ok=True)
        probe = out / ".synth-write-test"
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as exc:
        raise SynthError(f"output folder {out} is not writable ({exc.strerror or exc}); choose a folder you can write to") from None
    return out


def generate_extract(*, persons: int, seed: int, out: Path, force: bool = False,
                     chunk_persons: int = 50_000, progress: bool = True) -> SynthSummary:
    """Write a synthetic OMOP CDM v5.4 extract of Harrowmere Valley Health and its ground truth.

    Parameters
    ----------
    persons : int
        Number of persons (> 0).
    seed : int
        Random seed (>= 0). The same persons, seed and chunk_persons give identical files.
    out : Path
        Output folder; the extract goes to ``out/extract``, the truth to ``out/truth``.
    force : bool
        Replace ``out/extract`` and ``out/truth`` when ``out`` is not empty.
    chunk_persons : int
        Persons generated and written per chunk; bounds peak memory.
    progress : bool
        Print a progress line to standard error.

    Returns
    -------
    SynthSummary

    Raises
    ------
    SynthError
        For a bad argument (persons <= 0, an unwritable or non-empty folder without force).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> s = generate_extract(persons=200, seed=1, out=pathlib.Path(tempfile.mkdtemp()), progress=False)
    >>> s.persons, (s.extract_dir / "measurement.parquet").exists()
    (200, True)
    """
    started = time.perf_counter()
    out = _check_args(persons, seed, out, force, chunk_persons)
    extract_dir, truth_dir = out / "extract", out / "truth"
    for d in (extract_dir, truth_dir):
        if d.exists():
            shutil.rmtree(d)
        d.mkdir(parents=True)
    codes = CodeTable()
    ids = Ids()
    writers = _Writers(extract_dir, SCHEMAS, store_schema=False)
    truth_schemas = {"episodes": _TRUTH_EPISODE_SCHEMA, "persons": _TRUTH_PERSON_SCHEMA}
    twriters = _Writers(truth_dir, truth_schemas)
    faults = {k: 0 for k in FAULT_KINDS}
    faults_by_hospital = {k: [0] * len(P.HOSPITALS) for k in ("glucose_mg_dl_rows", "bhb_mg_dl_rows")}
    n_chunks = (persons + chunk_persons - 1) // chunk_persons
    reporter = _Progress(n_chunks, persons) if progress else None
    truth_count = 0
    try:
        for ci in range(n_chunks):
            first = ci * chunk_persons
            n = min(chunk_persons, persons - first)
            rng = np.random.default_rng(np.random.SeedSequence([int(seed), ci, 20_190_101]))
            ch = generate_chunk(rng, first + 1, n, ids, codes)
            truth_count = _write_chunk(ch, rng, ids, codes, writers, twriters, faults, faults_by_hospital, truth_count)
            if reporter:
                reporter.update(ci + 1, first + n, writers.rows["measurement"])
        _write_fixed_tables(writers)
    finally:
        writers.close()
        twriters.close()
        if reporter:
            reporter.done()
    doc = {
        "counts": faults,
        "by_hospital": {k: {str(h["care_site_id"]): v[i] for i, h in enumerate(P.HOSPITALS)}
                        for k, v in faults_by_hospital.items()},
        "definitions": _FAULT_DEFINITIONS,
    }
    (truth_dir / "faults.json").write_text(json.dumps(doc, indent=2, sort_keys=True) + "\n")
    (truth_dir / "effects.json").write_text(json.dumps(effects_json(), indent=2, sort_keys=True) + "\n")
    (truth_dir / "README.md").write_text(truth_readme())
    rows = dict(writers.rows)
    return SynthSummary(extract_dir=extract_dir, truth_dir=truth_dir, persons=int(persons),
                        measurement_rows=rows["measurement"], rows_per_table=rows,
                        seconds=time.perf_counter() - started)


class _Progress:
    def __init__(self, chunks: int, persons: int) -> None:
        self.chunks, self.persons, self.t0 = chunks, persons, time.perf_counter()

    def update(self, done: int, persons_done: int, meas: int) -> None:
        el = time.perf_counter() - self.t0
        sys.stderr.write(f"\rsynth: chunk {done}/{self.chunks}, {persons_done:,}/{self.persons:,} persons, "
                         f"{meas:,} measurement rows, {el:.1f} s")
        sys.stderr.flush()

    def done(self) -> None:
        sys.stderr.write("\n")
        sys.stderr.flush()


_FAULT_DEFINITIONS = {
    "glucose_mg_dl_rows": "measurement rows of a glucose LOINC code with unit_concept_id = UCUM mg/dL (value = mmol/L x 18.016)",
    "bhb_mg_dl_rows": "measurement rows of a beta-hydroxybutyrate LOINC code with unit UCUM mg/dL (value = mmol/L x 10.41)",
    "missing_unit_rows": "glucose or bicarbonate rows with unit_concept_id null or 0 (and unit_source_value null)",
    "duplicate_rows": "rows repeating an earlier row's person_id, measurement_concept_id, measurement_datetime and value_as_number under a new measurement_id",
    "decimal_slip_ph_rows": "pH rows with value_as_number 10 times the true value (e.g. 72.1 for 7.21), i.e. value > 14",
    "date_only_rows": "rows with measurement_datetime null (measurement_date set)",
    "after_death_rows": "rows with measurement_date after the person's death_date",
    "ordinal_urine_ketone_rows": "urine ketone rows with an ordinal answer (value_as_concept_id and/or value_source_value, no number)",
    "icd_missed_episodes": "true DKA episodes (truth kind dka) with no ICD-10-CM DKA code on their visits",
    "icd_false_label_visits": "visits that carry an ICD-10-CM DKA code but are not a true DKA episode (mimics and follow-up clinic visits)",
}


def _masked_ids(v: np.ndarray) -> Masked:
    return Masked(np.where(v < 0, 0, v), v < 0)


def _write_chunk(ch, rng, ids, codes, writers, twriters, faults, fbh, truth_count) -> int:
    pe, pid = ch["pe"], ch["pid"]
    n = pid.size
    off = pid[0]  # person local index -> person_id
    pid_of = lambda local: off + np.asarray(local, dtype=np.int64)  # noqa: E731
    # ---- person ----------------------------------------------------------------------------
    bday = pe["birth_day"]
    bdate = (np.datetime64("2019-01-01") + bday.astype("timedelta64[D]"))
    yob = bdate.astype("datetime64[Y]").astype(np.int64) + 1970
    mob = bdate.astype("datetime64[M]").astype(np.int64) % 12 + 1
    dob = (bdate - bdate.astype("datetime64[M]")).astype(np.int64) + 1
    gender = np.where(pe["female"], cid("Gender", "F"), cid("Gender", "M"))
    cs = np.array([h["care_site_id"] for h in P.HOSPITALS], dtype=np.int64)
    writers.write("person", make_table("person", {
        "person_id": pid, "gender_concept_id": gender, "year_of_birth": yob, "month_of_birth": mob,
        "day_of_birth": dob, "birth_datetime": EPOCH_US + bday * 86_400_000_000,
        "race_concept_id": np.zeros(n, np.int64), "ethnicity_concept_id": np.zeros(n, np.int64),
        "location_id": cs[pe["home"]], "care_site_id": cs[pe["home"]],
        "person_source_value": pa.array(np.char.add("HV", pid.astype(str))),
        "gender_source_value": Str(pe["female"].astype(np.int8), ["M", "F"]),
        "gender_source_concept_id": np.zeros(n, np.int64), "race_source_concept_id": np.zeros(n, np.int64),
        "ethnicity_source_concept_id": np.zeros(n, np.int64),
    }, n))
    writers.write("observation_period", make_table("observation_period", {
        "observation_period_id": ids.take("observation_period", n), "person_id": pid,
        "observation_period_start_date": P.EPOCH_DAY + pe["start_day"],
        "observation_period_end_date": P.EPOCH_DAY + pe["end_day"],
        "period_type_concept_id": np.zeros(n, np.int64),
    }, n))
    died = ch["died"]
    di = np.nonzero(died)[0]
    dt_ = ch["death_t"][di]
    has_dt = ~np.isnan(dt_)
    writers.write("death", make_table("death", {
        "person_id": pid[di], "death_date": P.EPOCH_DAY + ch["death_day"][di],
        "death_datetime": Masked(_ts(np.where(has_dt, dt_, 0)), ~has_dt),
        "death_type_concept_id": np.zeros(di.size, np.int64),
    }, di.size))
    # ---- visits ----------------------------------------------------------------------------
    if ch["visits"]:
        v = {k: np.concatenate([b[k] for b in ch["visits"]]) for k in ch["visits"][0]}
        k = v["id"].size
        vlabels = ["IP", "ER", "ERIP", "OP"]
        vconc = [cid("Visit", x) for x in vlabels]
        writers.write("visit_occurrence", make_table("visit_occurrence", {
            "visit_occurrence_id": v["id"], "person_id": pid_of(v["person"]), "visit_concept_id": v["concept"],
            "visit_start_date": _day(v["start"]), "visit_start_datetime": _ts(v["start"]),
            "visit_end_date": _day(v["end"]), "visit_end_datetime": _ts(v["end"]),
            "visit_type_concept_id": np.zeros(k, np.int64), "care_site_id": v["care_site"],
            "visit_source_value": Str(np.searchsorted(np.array(vconc), v["concept"]), vlabels),
            "visit_source_concept_id": np.zeros(k, np.int64),
            "admitted_from_concept_id": np.zeros(k, np.int64), "discharged_to_concept_id": np.zeros(k, np.int64),
            "preceding_visit_occurrence_id": _masked_ids(v["preceding"]),
        }, k))
    if ch["vdetails"]:
        v = {k: np.concatenate([b[k] for b in ch["vdetails"]]) for k in ch["vdetails"][0]}
        k = v["id"].size
        writers.write("visit_detail", make_table("visit_detail", {
            "visit_detail_id": v["id"], "person_id": pid_of(v["person"]),
            "visit_detail_concept_id": np.full(k, cid("Visit", "ICU")),
            "visit_detail_start_date": _day(v["start"]), "visit_detail_start_datetime": _ts(v["start"]),
            "visit_detail_end_date": _day(v["end"]), "visit_detail_end_datetime": _ts(v["end"]),
            "visit_detail_type_concept_id": np.zeros(k, np.int64), "care_site_id": v["care_site"],
            "visit_detail_source_value": Str(np.zeros(k, np.int8), ["ICU"]),
            "visit_detail_source_concept_id": np.zeros(k, np.int64), "visit_occurrence_id": v["visit"],
        }, k))
    # ---- drugs -----------------------------------------------------------------------------
    if ch["drugs"]:
        v = {k: np.concatenate([b[k] for b in ch["drugs"]]) for k in ch["drugs"][0]}
        k = v["id"].size
        dtm = v["datetime"]
        route_labels = ["intravenous", "subcutaneous", "oral"]
        route_ids = [cid("SNOMED", x) for x in ("47625008", "34206005", "26643006")]
        r_idx = np.select([v["route"] == r for r in route_ids], [0, 1, 2], -1)
        writers.write("drug_exposure", make_table("drug_exposure", {
            "drug_exposure_id": v["id"], "person_id": pid_of(v["person"]), "drug_concept_id": v["concept"],
            "drug_exposure_start_date": _day(v["start"]),
            "drug_exposure_start_datetime": Masked(_ts(v["start"]), ~dtm),
            "drug_exposure_end_date": _day(v["end"]),
            "drug_exposure_end_datetime": Masked(_ts(v["end"]), ~dtm),
            "drug_type_concept_id": np.zeros(k, np.int64),
            "quantity": Masked(np.nan_to_num(v["qty"]), np.isnan(v["qty"])),
            "days_supply": _masked_ids(v["days"]), "sig": Str(v["sig"], ch["sig_labels"]),
            "route_concept_id": v["route"], "visit_occurrence_id": _masked_ids(v["visit"]),
            "drug_source_value": Str(v["source"], ch["drug_labels"]),
            "drug_source_concept_id": np.zeros(k, np.int64), "route_source_value": Str(r_idx, route_labels),
        }, k))
    # ---- conditions --------------------------------------------------------------------------
    if ch["conds"]:
        v = {k: np.concatenate([b[k] for b in ch["conds"]]) for k in ch["conds"][0]}
        k = v["id"].size
        writers.write("condition_occurrence", make_table("condition_occurrence", {
            "condition_occurrence_id": v["id"], "person_id": pid_of(v["person"]),
            "condition_concept_id": v["concept"], "condition_start_date": _day(v["t"]),
            "condition_start_datetime": Masked(_ts(v["t"]), ~v["datetime"]),
            "condition_type_concept_id": np.zeros(k, np.int64),
            "visit_occurrence_id": _masked_ids(v["visit"]),
            "condition_source_value": Str(v["label"], ch["cond_labels"]),
            "condition_source_concept_id": v["source_concept"],
        }, k))
        dka_src = {cid("ICD10CM", c) for c in ("E10.10", "E10.11", "E11.10", "E11.11", "E13.10")}
        coded_visits = np.unique(v["visit"][np.isin(v["source_concept"], list(dka_src))])
    else:
        coded_visits = np.zeros(0, np.int64)
    # ---- measurement (with faults) -------------------------------------------------------------
    r = ch["rows"]
    total = _write_measurement(r, rng, ids, codes, writers, ch, pid_of, faults, fbh)
    del total
    # ---- truth -------------------------------------------------------------------------------
    tr = ch["truth"]
    if tr:
        m = tr["person"].size
        is_dka = tr["kind"] == 0
        coded = np.isin(tr["visit"], coded_visits) | np.isin(tr["visit_ip"], coded_visits)
        faults["icd_missed_episodes"] += int((is_dka & ~coded).sum())
        true_visits = np.concatenate([tr["visit"][is_dka], tr["visit_ip"][is_dka]])
        faults["icd_false_label_visits"] += int((~np.isin(coded_visits, true_visits)).sum())
        kinds = ["dka", *MIMIC_KINDS]
        order = np.lexsort((tr["arrival"], tr["person"]))
        tr = {k: val[order] for k, val in tr.items()}
        coded = coded[order]
        tid = np.arange(truth_count + 1, truth_count + m + 1)
        twriters.write("episodes", _truth_episode_table(tr, tid, kinds, coded, pid_of, pe))
        truth_count += m
    ne = np.zeros(n, np.int64)
    if tr:
        np.add.at(ne, tr["person"][tr["kind"] == 0], 1)
    twriters.write("persons", pa.table({
        "person_id": pid, "diabetes_type": pa.array(np.array(GROUP_NAMES)[pe["group"]]),
        "sex": pa.array(np.where(pe["female"], "F", "M")),
        "age_years_2019_01_01": pe["age_2019"], "age_years_at_observation_start": pe["age_start"],
        "care_site_id": cs[pe["home"]], "hba1c_mmol_mol": pe["hba1c"],
        "has_missed_insulin": pe["missed"], "has_basal_insulin": pe["basal"], "has_sglt2i": pe["sglt2"],
        "has_metformin": pe["metformin"],
        "observation_start_date": pa.array((P.EPOCH_DAY + pe["start_day"]).astype(np.int32)).cast(pa.date32()),
        "observation_end_date": pa.array((P.EPOCH_DAY + pe["end_day"]).astype(np.int32)).cast(pa.date32()),
        "death_date": pa.array((P.EPOCH_DAY + ch["death_day"]).astype(np.int32), mask=~died).cast(pa.date32()),
        "dka_episodes": ne, "dka_log_hazard_without_prior": ch["lp"],
    }, schema=_TRUTH_PERSON_SCHEMA))
    return truth_count


def _write_measurement(r, rng, ids, codes, writers, ch, pid_of, faults, fbh) -> int:
    nrow = r["person"].size
    if nrow == 0:
        return 0
    # order rows by person and time, as an extract export typically is
    key = r["person"] * (1 << 32) + np.round(r["t"] + (1 << 20)).astype(np.int64)
    order = np.argsort(key, kind="stable")
    del key
    code, ordinal = r["code"][order], r["ordinal"][order]
    is_ord = ordinal >= 0
    source, hosp0 = r["source"][order], r["hosp"][order]
    is_glu = codes.mask_analyte(code, "glucose")
    is_bic = codes.mask_analyte(code, "bicarbonate")
    is_ph = codes.mask_analyte(code, "ph")
    is_bhb = codes.mask_analyte(code, "bhb")
    # faults on a row are mutually exclusive: one uniform draw per row, cut into disjoint ranges
    fa = P.FAULTS
    u = rng.random(nrow)
    a1 = fa["missing_unit_share_glucose_bicarbonate"]
    a2 = a1 + fa["decimal_slip_share_ph"]
    a3 = a2 + fa["date_only_share_any"]
    a4 = a3 + fa["duplicate_share"]
    # missing units on a few glucose / bicarbonate rows (half null, half 0)
    miss = (is_glu | is_bic) & (u < a1)
    miss_zero = miss & (u < a1 / 2)
    # decimal slip of pH (72.1 for 7.21)
    slip = is_ph & (u >= a1) & (u < a2)
    # date-only results: outpatient results of one hospital's laboratory interface, and a few anywhere
    share_h = np.array([h["date_only_outpatient"] for h in P.HOSPITALS])[hosp0]
    date_only = ((u >= a2) & (u < a3)) | ((source == 0) & (u >= a4) & (u < a4 + share_h))
    # duplicate postings (copies appended under new ids)
    dup = ~is_ord & (source != 3) & (u >= a3) & (u < a4)
    di = np.nonzero(dup)[0]
    if di.size:
        sel_local = np.r_[np.arange(nrow), di]
        miss, miss_zero, slip, date_only = miss[sel_local], miss_zero[sel_local], slip[sel_local], date_only[sel_local]
        is_glu, is_bhb, is_ph = is_glu[sel_local], is_bhb[sel_local], is_ph[sel_local]
        code, ordinal = code[sel_local], ordinal[sel_local]
        sel = np.r_[order, order[di]]
    else:
        sel = order
    r = {k: r[k][sel] for k in ("person", "t", "canon", "visit", "vdetail", "hosp")}
    is_ord = ordinal >= 0
    n = code.size
    # reported values
    dec = codes.decimals[code]
    val = r["canon"] * codes.factor[code] + codes.offset[code]
    scale = 10.0 ** dec
    val = np.round(val * scale) / scale
    val = np.where(slip, np.round(val * 10 * (scale / 10)) / (scale / 10), val)
    unit = codes.unit_concept[code]
    unit_mask = ~codes.has_unit[code] | (miss & ~miss_zero)
    unit = np.where(miss_zero, 0, unit)
    uidx = np.where(miss | ~codes.has_unit[code], -1, codes.unit_label_idx[code])
    # ordinal answers
    hosp = r["hosp"]
    style_concept = np.array([h["urine_ketone_style"] == "concept" for h in P.HOSPITALS])[hosp]
    ans_ids = {o: cid("SNOMED", c) for c, _n, o in KETONE_ANSWERS if c != "260405006"}
    ans = np.array([ans_ids[o] for o in range(5)])
    vac = np.where(is_ord, np.where(style_concept, ans[np.maximum(ordinal, 0)], 0), 0)
    txt_labels = ["neg", "1+", "2+", "3+", "4+", "small", "moderate", "large"]
    word = np.array([0, 5, 6, 7, 7])
    txt = np.where(is_ord, np.where(style_concept, np.maximum(ordinal, 0), word[np.maximum(ordinal, 0)]), -1)
    low, high = codes.low[code], codes.high[code]
    ids_m = ids.take("measurement", n)
    t = r["t"]
    concept = codes.concept[code]
    persons = pid_of(r["person"])
    mdate = _day(t)
    writers.write("measurement", make_table("measurement", {
        "measurement_id": ids_m, "person_id": persons, "measurement_concept_id": concept,
        "measurement_date": mdate, "measurement_datetime": Masked(_ts(t), date_only),
        "measurement_type_concept_id": np.zeros(n, np.int64),
        "value_as_number": Masked(np.nan_to_num(val), is_ord),
        "value_as_concept_id": Masked(vac, ~is_ord),
        "unit_concept_id": Masked(unit, unit_mask),
        "range_low": Masked(np.nan_to_num(low), np.isnan(low) | is_ord),
        "range_high": Masked(np.nan_to_num(high), np.isnan(high) | is_ord),
        "visit_occurrence_id": _masked_ids(r["visit"]), "visit_detail_id": _masked_ids(r["vdetail"]),
        "measurement_source_value": Str(code, codes.labels),
        "measurement_source_concept_id": concept,
        "unit_source_value": Str(uidx, codes.unit_labels),
        "value_source_value": Str(txt, txt_labels),
    }, n))
    # ---- fault counts from the rows as written ---------------------------------------------
    mgdl = cid("UCUM", "mg/dL")
    written_unit = np.where(unit_mask, -1, unit)
    g_mg = is_glu & (written_unit == mgdl)
    b_mg = is_bhb & (written_unit == mgdl)
    faults["glucose_mg_dl_rows"] += int(g_mg.sum())
    faults["bhb_mg_dl_rows"] += int(b_mg.sum())
    for hi in range(len(P.HOSPITALS)):
        fbh["glucose_mg_dl_rows"][hi] += int((g_mg & (hosp == hi)).sum())
        fbh["bhb_mg_dl_rows"][hi] += int((b_mg & (hosp == hi)).sum())
    faults["missing_unit_rows"] += int(miss.sum())
    faults["duplicate_rows"] += int(di.size)
    faults["decimal_slip_ph_rows"] += int((is_ph & (val > 14)).sum())
    faults["date_only_rows"] += int(date_only.sum())
    dday = np.full(ch["pid"].size, np.iinfo(np.int64).max)
    dday[ch["died"]] = P.EPOCH_DAY + ch["death_day"][ch["died"]]
    faults["after_death_rows"] += int((mdate > dday[r["person"]]).sum())
    faults["ordinal_urine_ketone_rows"] += int(is_ord.sum())
    return n


def _write_fixed_tables(writers: _Writers) -> None:
    k = len(P.HOSPITALS)
    writers.write("location", make_table("location", {
        "location_id": np.array([h["care_site_id"] for h in P.HOSPITALS], dtype=np.int64),
        "city": pa.array([h["town"] for h in P.HOSPITALS]),
        "location_source_value": pa.array([h["source"] for h in P.HOSPITALS]),
        "country_concept_id": np.zeros(k, np.int64),
        "country_source_value": pa.array(["Harrowmere Valley (fictional)"] * k),
    }, k))
    writers.write("care_site", make_table("care_site", {
        "care_site_id": np.array([h["care_site_id"] for h in P.HOSPITALS], dtype=np.int64),
        "care_site_name": pa.array([h["name"] for h in P.HOSPITALS]),
        "place_of_service_concept_id": np.zeros(k, np.int64),
        "location_id": np.array([h["care_site_id"] for h in P.HOSPITALS], dtype=np.int64),
        "care_site_source_value": pa.array([h["source"] for h in P.HOSPITALS]),
        "place_of_service_source_value": pa.array(["hospital"] * k),
    }, k))
    c = CONCEPTS
    nc = len(c)
    writers.write("concept", make_table("concept", {
        "concept_id": np.array([CONCEPT_ID[(x.vocabulary_id, x.concept_code)] for x in c], dtype=np.int64),
        "concept_name": pa.array([x.concept_name for x in c]), "domain_id": pa.array([x.domain_id for x in c]),
        "vocabulary_id": pa.array([x.vocabulary_id for x in c]),
        "concept_class_id": pa.array([x.concept_class_id for x in c]),
        "standard_concept": pa.array([x.standard_concept for x in c], type=pa.string()),
        "concept_code": pa.array([x.concept_code for x in c]),
        "valid_start_date": pa.array([VALID_START] * nc, type=pa.date32()),
        "valid_end_date": pa.array([VALID_END] * nc, type=pa.date32()),
    }, nc))
    rows = ancestor_rows()
    arr = np.array(rows, dtype=np.int64)
    writers.write("concept_ancestor", make_table("concept_ancestor", {
        "ancestor_concept_id": arr[:, 0], "descendant_concept_id": arr[:, 1],
        "min_levels_of_separation": arr[:, 2], "max_levels_of_separation": arr[:, 3],
    }, len(rows)))


_TS = pa.timestamp("us")
_TRUTH_EPISODE_SCHEMA = pa.schema([
    ("truth_id", pa.int64()), ("person_id", pa.int64()), ("kind", pa.string()),
    ("care_site_id", pa.int64()), ("visit_occurrence_id", pa.int64()),
    ("inpatient_visit_occurrence_id", pa.int64()), ("arrival_datetime", _TS),
    ("onset_datetime", _TS), ("resolution_datetime", _TS), ("documented_resolution_datetime", _TS),
    ("discharge_datetime", _TS),
    ("severity", pa.string()), ("onset_glucose_mmol_l", pa.float64()), ("onset_ph", pa.float64()),
    ("onset_bicarbonate_mmol_l", pa.float64()), ("onset_bhb_mmol_l", pa.float64()),
    ("is_euglycaemic", pa.bool_()), ("insulin_start_datetime", _TS), ("insulin_end_datetime", _TS),
    ("infusion_rows", pa.int64()), ("hours_arrival_to_insulin", pa.float64()),
    ("hours_insulin_to_resolution", pa.float64()), ("hours_onset_to_resolution", pa.float64()),
    ("hours_onset_to_documented_resolution", pa.float64()),
    ("is_premature_closure", pa.bool_()), ("has_basal_before_closure", pa.bool_()),
    ("hours_basal_before_closure", pa.float64()), ("has_hypoglycaemia", pa.bool_()),
    ("has_hypokalaemia", pa.bool_()), ("planned_hypoglycaemia", pa.bool_()),
    ("planned_hypokalaemia", pa.bool_()), ("has_rebound", pa.bool_()), ("has_icu", pa.bool_()),
    ("died", pa.bool_()), ("is_icd_coded_dka", pa.bool_()), ("age_years", pa.float64()),
    ("diabetes_type", pa.string()), ("has_sglt2i", pa.bool_()), ("prior_episodes", pa.int64()),
    ("resolution_log_hazard", pa.float64()),
])

_TRUTH_PERSON_SCHEMA = pa.schema([
    ("person_id", pa.int64()), ("diabetes_type", pa.string()), ("sex", pa.string()),
    ("age_years_2019_01_01", pa.float64()), ("age_years_at_observation_start", pa.float64()),
    ("care_site_id", pa.int64()), ("hba1c_mmol_mol", pa.float64()), ("has_missed_insulin", pa.bool_()),
    ("has_basal_insulin", pa.bool_()), ("has_sglt2i", pa.bool_()), ("has_metformin", pa.bool_()),
    ("observation_start_date", pa.date32()), ("observation_end_date", pa.date32()),
    ("death_date", pa.date32()), ("dka_episodes", pa.int64()), ("dka_log_hazard_without_prior", pa.float64()),
])


def _ts_arr(t: np.ndarray) -> pa.Array:
    bad = np.isnan(t)
    return pa.array(_ts(np.where(bad, 0, t)), mask=bad if bad.any() else None).view(_TS) if t.size else pa.array([], _TS)


def _f(x: np.ndarray) -> pa.Array:
    x = np.asarray(x, dtype=np.float64)
    return pa.array(x, mask=np.isnan(x), type=pa.float64())


def _truth_episode_table(tr, tid, kinds, coded, pid_of, pe) -> pa.Table:
    is_dka = tr["kind"] == 0
    cs = np.array([h["care_site_id"] for h in P.HOSPITALS], dtype=np.int64)
    sev = np.where(tr["sev"] >= 0, tr["sev"], 0)
    has_ins = ~np.isnan(tr["ins"])
    null_non_dka = lambda a: pa.array(a, mask=~is_dka)  # noqa: E731
    return pa.table({
        "truth_id": tid, "person_id": pid_of(tr["person"]), "kind": pa.array(np.array(kinds)[tr["kind"]]),
        "care_site_id": cs[tr["hosp"]], "visit_occurrence_id": tr["visit"],
        "inpatient_visit_occurrence_id": tr["visit_ip"],
        "arrival_datetime": _ts_arr(tr["arrival"]), "onset_datetime": _ts_arr(tr["onset"]),
        "resolution_datetime": _ts_arr(tr["res"]), "documented_resolution_datetime": _ts_arr(tr["res_doc"]),
        "discharge_datetime": _ts_arr(tr["discharge"]),
        "severity": pa.array(np.array(SEVERITY_NAMES)[sev], mask=~is_dka),
        "onset_glucose_mmol_l": _f(tr["g0"]), "onset_ph": _f(tr["ph0"]),
        "onset_bicarbonate_mmol_l": _f(tr["hco3"]), "onset_bhb_mmol_l": _f(tr["bhb0"]),
        "is_euglycaemic": null_non_dka(tr["eu"]),
        "insulin_start_datetime": _ts_arr(tr["ins"]), "insulin_end_datetime": _ts_arr(tr["ins_end"]),
        "infusion_rows": tr["inf_rows"],
        "hours_arrival_to_insulin": _f((tr["ins"] - tr["arrival"]) / 60),
        "hours_insulin_to_resolution": _f((tr["res"] - tr["ins"]) / 60),
        "hours_onset_to_resolution": _f((tr["res"] - tr["onset"]) / 60),
        "hours_onset_to_documented_resolution": _f((tr["res_doc"] - tr["onset"]) / 60),
        "is_premature_closure": null_non_dka(tr["premature"]),
        "has_basal_before_closure": null_non_dka(tr["basal_before"]),
        "hours_basal_before_closure": _f(tr["basal_hours"]),
        "has_hypoglycaemia": pa.array(tr["hypo"], mask=~(is_dka | has_ins)),
        "has_hypokalaemia": pa.array(tr["hypok"], mask=~(is_dka | has_ins)),
        "planned_hypoglycaemia": null_non_dka(tr["planned_hypo"]),
        "planned_hypokalaemia": null_non_dka(tr["planned_hypok"]),
        "has_rebound": null_non_dka(tr["rebound"]), "has_icu": tr["icu"], "died": tr["died"],
        "is_icd_coded_dka": coded, "age_years": tr["age"],
        "diabetes_type": pa.array(np.array(GROUP_NAMES)[pe["group"][tr["person"]]]),
        "has_sglt2i": tr["sglt2"], "prior_episodes": pa.array(tr["prior"], mask=~is_dka),
        "resolution_log_hazard": _f(tr["lp_res"]),
    }, schema=_TRUTH_EPISODE_SCHEMA)
