"""Persons, DKA episodes (hazard model and course on treatment) and mimics, vectorised.

Times are float minutes since 2019-01-01 00:00 (the start of the calendar), days are integer
days since that date. Nothing here loops over persons or measurements; loops run over rounds
(episode number) and over the five hospitals only.
"""

from __future__ import annotations

import numpy as np

from synthetic import _params as P

MIN_H = 60.0
MIN_D = P.MIN_PER_DAY
YEAR = P.MIN_PER_YEAR
NONE, T1, T2 = 0, 1, 2
GROUP_NAMES = ("none", "type1", "type2")
SEVERITY_NAMES = ("mild", "moderate", "severe")
# episode rounds per chunk: far more than anyone reaches (a cap at 12 cut off the persons of the
# highest hazard and biased the recurrence and SGLT2-inhibitor hazard ratios towards zero)
MAX_ROUNDS = 10_000


def expand(counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For counts per owner, return (owner index, index within owner) of every item.

    Examples
    --------
    >>> o, w = expand(np.array([2, 0, 3]))
    >>> o.tolist(), w.tolist()
    ([0, 0, 2, 2, 2], [0, 1, 0, 1, 2])
    """
    counts = np.asarray(counts, dtype=np.int64)
    owner = np.repeat(np.arange(counts.size), counts)
    starts = np.cumsum(counts) - counts
    within = np.arange(owner.size) - np.repeat(starts, counts)
    return owner, within


def inside_intervals(person: np.ndarray, t: np.ndarray, iv_person: np.ndarray,
                     iv_start: np.ndarray, iv_end: np.ndarray) -> np.ndarray:
    """True where (person, t) falls inside one of that person's intervals (non-overlapping)."""
    if iv_person.size == 0 or person.size == 0:
        return np.zeros(person.size, dtype=bool)
    scale = 1e7  # > minutes in the calendar plus margins
    key_iv = iv_person.astype(np.float64) * scale + iv_start
    order = np.argsort(key_iv, kind="stable")
    key_iv = key_iv[order]
    ivp, ive = iv_person[order], iv_end[order]
    key = person.astype(np.float64) * scale + t
    pos = np.searchsorted(key_iv, key, side="right") - 1
    ok = pos >= 0
    pos_c = np.where(ok, pos, 0)
    return ok & (ivp[pos_c] == person) & (t <= ive[pos_c])


def make_persons(rng: np.random.Generator, n: int) -> dict[str, np.ndarray]:
    """Draw the persons of one chunk (local index 0..n-1)."""
    pp = P.POPULATION
    u = rng.random(n)
    grp = np.where(u < pp["share_type1"], T1, np.where(u < pp["share_type1"] + pp["share_type2"], T2, NONE))
    child = rng.random(n) < pp["share_type1_children"]
    age = np.where(
        grp == T1,
        np.where(child, rng.uniform(2, 18, n), rng.uniform(18, 75, n)),
        np.where(grp == T2, np.clip(rng.normal(60, 12, n), 25, 92), rng.uniform(0.5, 90, n)),
    )
    birth_day = np.floor(-age * 365.25).astype(np.int64)
    start_day = np.where(rng.random(n) < pp["share_enrolled_at_start"], 0,
                         rng.integers(0, P.N_DAYS // 2, n))
    leave = rng.random(n) < pp["share_leaving_early"]
    end_day = np.where(leave, rng.integers(start_day + 180, P.N_DAYS), P.N_DAYS - 1)
    # background deaths: Gompertz-like annual rate by age at start, higher with diabetes
    age_start = age + start_day / 365.25
    rate = np.exp(-10.5 + 0.095 * age_start) * np.where(grp > 0, 1.5, 1.0)
    death_day = start_day + np.floor(rng.exponential(size=n) / rate * 365.25).astype(np.int64)
    died = death_day < end_day
    end_day = np.where(died, death_day, end_day)
    start_day = np.minimum(start_day, np.maximum(end_day - 60, 0))
    female = rng.random(n) < 0.5
    shares = np.array([h["share"] for h in P.HOSPITALS])
    home = rng.choice(len(shares), size=n, p=shares / shares.sum())
    hba1c = np.where(
        grp == T1, np.clip(rng.normal(68, 14, n), 42, 130),
        np.where(grp == T2, np.clip(rng.normal(58, 12, n), 40, 120), np.clip(rng.normal(36, 3.5, n), 25, 46)),
    )
    basal = (grp == T1) | ((grp == T2) & (rng.random(n) < pp["share_basal_type2"]))
    missed = ((grp == T1) & (rng.random(n) < pp["share_missed_insulin_type1"])) | (
        (grp == T2) & basal & (rng.random(n) < pp["share_missed_insulin_type2_insulin"]))
    sglt2 = ((grp == T2) & (rng.random(n) < pp["share_sglt2i_type2"])) | (
        (grp == T1) & (rng.random(n) < pp["share_sglt2i_type1"]))
    metformin = (grp == T2) & (rng.random(n) < pp["share_metformin_type2"])
    basal_kind = rng.choice(3, size=n, p=[0.6, 0.2, 0.2])  # glargine, detemir, degludec
    sglt2_kind = rng.choice(4, size=n, p=[0.40, 0.45, 0.12, 0.03])  # dapa, empa, cana, ertu
    creat = np.exp(rng.normal(np.log(75 + 15 * (grp == T2)), 0.18, n)) * np.where(age < 16, 0.6, 1.0)
    return {
        "group": grp, "age_start": age_start, "age_2019": age, "birth_day": birth_day,
        "start_day": start_day, "end_day": end_day, "bg_death": died, "female": female,
        "home": home, "hba1c": hba1c, "basal": basal, "missed": missed, "sglt2": sglt2,
        "metformin": metformin, "basal_kind": basal_kind, "sglt2_kind": sglt2_kind, "creat": creat,
    }


def dka_linear_predictor(pe: dict[str, np.ndarray]) -> np.ndarray:
    """Log-hazard of DKA per person (without the prior-episode term), per DKA_HAZARD."""
    b = P.DKA_HAZARD["log_hr"]
    age = pe["age_start"]
    return (
        b["missed_insulin"] * pe["missed"]
        + b["age_under_18"] * (age < 18)
        + b["age_18_to_25"] * ((age >= 18) & (age < 25))
        + b["hba1c_per_10_mmol_mol_above_64"] * (pe["hba1c"] - 64) / 10
        + b["sglt2i"] * pe["sglt2"]
        + b["female"] * pe["female"]
    )


# --- laboratory draws of the course: what the clinicians (and an analysis) see ---------------
# The hourly draws of an episode (slot j at onset + j h, jittered by -5..5 min for j > 0) carry
# measurement noise that is a fixed function of (episode key, slot, stream), so the course can
# read the same reported values the extract will hold before the extract is written: closure
# is planned on documented resolution, which only these reported values reveal.
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
STREAM_JITTER, STREAM_BHB_MULT, STREAM_BHB_ADD, STREAM_PH, STREAM_HCO3 = 0, 1, 2, 3, 4
NOISE_BHB_MULT, NOISE_BHB_ADD, NOISE_PH, NOISE_HCO3 = 0.08, 0.05, 0.015, 0.8
# how each hospital's reports round-trip to canonical values (truth/README: recording practice)
_BHB_FACTOR = np.array([P.BHB_MG_DL_PER_MMOL_L if hh["bhb"][1] == "mg/dL" else 1.0 for hh in P.HOSPITALS])
# total CO2 (2028-9) reads about 1 mmol/L above bicarbonate, and the gas analyser's venous
# bicarbonate (14627-4) 1 above serum: the highest bicarbonate an analysis can see at a gas draw
_HCO3_HIGHEST_PLUS = np.array([1.0 if (hh["bicarbonate"][0] == "2028-9" or hh["bicarbonate_gas"]) else 0.0
                               for hh in P.HOSPITALS])
BHB_EVERY_H = np.array([hh["bhb_every_h"] for hh in P.HOSPITALS])
GAS_EVERY_H = np.array([hh["gas_every_h"] for hh in P.HOSPITALS])


def _mix64(x: np.ndarray) -> np.ndarray:
    """SplitMix64 finaliser (Steele GL, Lea D, Flood CH. Fast splittable pseudorandom number
    generators. OOPSLA 2014): a bijective 64-bit mix, vectorised."""
    with np.errstate(over="ignore"):
        z = x + _GOLDEN
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return z ^ (z >> np.uint64(31))


def _uniform(key: np.ndarray, j: np.ndarray, stream: int) -> np.ndarray:
    """Uniform (0, 1) as a fixed function of (episode key, slot, stream)."""
    with np.errstate(over="ignore"):
        x = (np.asarray(key, dtype=np.uint64) ^ _mix64(np.asarray(j, dtype=np.uint64) * np.uint64(8) + np.uint64(stream)))
    return ((_mix64(x) >> np.uint64(11)).astype(np.float64) + 0.5) / 9007199254740992.0


def lab_normal(key: np.ndarray, j: np.ndarray, stream: int) -> np.ndarray:
    """Standard normal noise of slot ``j`` of the episodes with lab keys ``key`` (Box-Muller).

    Examples
    --------
    >>> z = lab_normal(np.full(20000, 12345, np.uint64), np.arange(20000), STREAM_PH)
    >>> bool(abs(z.mean()) < 0.05 and abs(z.std() - 1) < 0.05)
    True
    """
    u1 = _uniform(key, j, 2 * stream + 16)
    u2 = _uniform(key, j, 2 * stream + 17)
    return np.sqrt(-2.0 * np.log(u1)) * np.cos(2.0 * np.pi * u2)


def lab_jitter(key: np.ndarray, j: np.ndarray) -> np.ndarray:
    """Minutes (-5..5) a slot's draw lies off the hour; 0 for the onset draw (j = 0)."""
    jit = np.floor(_uniform(key, j, STREAM_JITTER) * 11).astype(np.int64) - 5
    return np.where(np.asarray(j) > 0, jit, 0)


def reported_acid_base(c: dict[str, np.ndarray], e: np.ndarray, j: np.ndarray,
                       t: np.ndarray) -> dict[str, np.ndarray]:
    """The values an episode's draw at slot ``j`` (time ``t``, minutes) reports, in canonical units.

    ``bhb`` and ``ph`` are the drawn values (the extract rounds them: ketones to 0.1 in the
    hospital's unit, pH to 0.01), ``hco3`` the serum bicarbonate (whole mmol/L, before any total
    CO2 offset); ``*_reported`` are the rounded canonical values an analysis reads.
    """
    key = c["lab_key"][e]
    s = acid_base(c, e, (t - c["ins"][e]) / MIN_H)
    bhb = np.maximum(s["bhb"] * (1 + NOISE_BHB_MULT * lab_normal(key, j, STREAM_BHB_MULT))
                     + NOISE_BHB_ADD * lab_normal(key, j, STREAM_BHB_ADD), 0.0)
    ph = s["ph"] + NOISE_PH * lab_normal(key, j, STREAM_PH)
    hco3 = np.round(np.maximum(s["hco3"] + NOISE_HCO3 * lab_normal(key, j, STREAM_HCO3), 2))
    f = _BHB_FACTOR[c["hosp"][e]]
    return {"bhb": bhb, "ph": ph, "hco3": hco3,
            "bhb_reported": np.round(bhb * f * 10) / 10 / f, "ph_reported": np.round(ph * 100) / 100}


def documented_resolution(c: dict[str, np.ndarray], idx: np.ndarray,
                          horizon_h: np.ndarray) -> dict[str, np.ndarray]:
    """First draws (minutes) at which the reported values of episodes ``idx`` meet resolution.

    At each hourly slot after onset the latest reported ketone and the latest gas (pH,
    bicarbonate) are read, as a clinician reads the chart. Three readings:

    * ``standard``: ketones < 0.6 mmol/L and venous pH >= 7.30 (the ketone-and-pH criteria of
      the 2024 consensus report, Umpierrez GE et al., Diabetes Care 2024;47:1257-1275, which
      JBDS 2023 shares with pH > 7.3; the same as the truth's physiological resolution);
    * ``earliest``: ketones < 0.6 and (pH >= 7.30 or the highest bicarbonate of the gas >= 18),
      the earliest any of those readings documents resolution (the consensus bicarbonate arm);
    * ``latest``: ketones < 0.6 and pH > 7.30 (JBDS 2023), the latest of them.

    NaN where no slot within ``horizon_h`` hours of insulin start meets the reading.
    """
    out = {name: np.full(idx.size, np.nan) for name in ("standard", "earliest", "latest")}
    if idx.size == 0:
        return out
    first_j = np.floor((c["ins"][idx] - c["onset"][idx]) / MIN_H).astype(np.int64)
    n_j = np.maximum(first_j + np.ceil(horizon_h).astype(np.int64) + 2, 2)
    for part in np.array_split(np.arange(idx.size), max(1, int(n_j.sum()) // 400_000 + 1)):
        if part.size == 0:
            continue
        ee = idx[part]
        width = int(n_j[part].max())
        e2 = np.repeat(ee, width)
        j2 = np.tile(np.arange(width), ee.size)
        t2 = c["onset"][e2] + j2 * MIN_H + lab_jitter(c["lab_key"][e2], j2)
        r = reported_acid_base(c, e2, j2, t2)
        h2 = c["hosp"][e2]
        shape = (ee.size, width)
        jj = j2.reshape(shape)
        bhb_drawn = ((j2 % BHB_EVERY_H[h2]) == 0).reshape(shape) & (jj > 0)
        gas_drawn = ((j2 % GAS_EVERY_H[h2]) == 0).reshape(shape) & (jj > 0)
        inside = jj < n_j[part][:, None]

        def carried(value: np.ndarray, drawn: np.ndarray) -> np.ndarray:
            # latest value drawn after onset at or before each slot (NaN before the first)
            last = np.maximum.accumulate(np.where(drawn, jj, -1), axis=1)
            rows = np.arange(ee.size)[:, None]
            v = value.reshape(shape)[rows, np.maximum(last, 0)]
            return np.where(last >= 0, v, np.nan)

        bhb = carried(r["bhb_reported"], bhb_drawn)
        ph = carried(r["ph_reported"], gas_drawn)
        hco3 = carried(r["hco3"] + _HCO3_HIGHEST_PLUS[h2], gas_drawn)
        ketones = bhb < 0.6
        tt = t2.reshape(shape)
        for name, ok in (("standard", ketones & (ph >= 7.3)),
                         ("earliest", ketones & ((ph >= 7.3) | (hco3 >= 18))),
                         ("latest", ketones & (ph > 7.3))):
            ok &= inside
            first = np.argmax(ok, axis=1)
            found = ok[np.arange(ee.size), first]
            out[name][part] = np.where(found, tt[np.arange(ee.size), first], np.nan)
    return out


def _documented(c: dict[str, np.ndarray], idx: np.ndarray, t_res_h: np.ndarray, k: int) -> dict[str, np.ndarray]:
    """:func:`documented_resolution` for episodes ``idx`` of ``k``, widening the horizon for those
    not yet documented (full-length arrays, NaN outside ``idx`` or when never documented)."""
    out = {name: np.full(k, np.nan) for name in ("standard", "earliest", "latest")}
    todo = idx
    for extra_h in (12.0, 48.0, 240.0):
        if todo.size == 0:
            break
        got = documented_resolution(c, todo, np.asarray(t_res_h)[todo] + extra_h)
        for name in out:
            out[name][todo] = np.where(np.isnan(out[name][todo]), got[name], out[name][todo])
        todo = todo[np.isnan(out["latest"][todo]) | np.isnan(out["earliest"][todo]) | np.isnan(out["standard"][todo])]
    return out


def _u(rng, lo, hi, k):
    return rng.uniform(lo, hi, k)


def dka_course(rng: np.random.Generator, p: np.ndarray, arrival: np.ndarray,
               pe: dict[str, np.ndarray], prior: int) -> dict[str, np.ndarray]:
    """The course of k episodes of persons ``p`` arriving at ``arrival`` (minutes)."""
    k = p.size
    care = P.CARE
    n_h = len(P.HOSPITALS)
    h = np.where(rng.random(k) < 0.9, pe["home"][p], rng.integers(0, n_h, k))
    age = (arrival - pe["birth_day"][p] * MIN_D) / YEAR
    sev = rng.choice(3, size=k, p=[P.SEVERITY_SHARES[s] for s in SEVERITY_NAMES])
    sg = pe["sglt2"][p]
    eu = sg & (rng.random(k) < care["sglt2i_euglycaemic_share"])
    # onset values inside the 2024 consensus bands of the class (Umpierrez GE et al., Diabetes
    # Care 2024;47:1257-1275; CLINICAL.md): mild pH > 7.25 to < 7.30, bicarbonate 15 to < 18;
    # moderate pH 7.00-7.25, bicarbonate 10 to < 15; severe pH < 7.00, bicarbonate < 10;
    # ketones 3-6 mmol/L in mild and moderate, > 6 in severe. Each range keeps about two
    # measurement-noise SDs (pH 0.015, bicarbonate 0.8, ketones 8%) inside the band edges that
    # would regrade the episode, so the drawn labs grade it in its own class
    lo_ph, hi_ph = np.array([7.27, 7.04, 6.85]), np.array([7.295, 7.22, 6.97])
    ph0 = rng.uniform(lo_ph[sev], hi_ph[sev])
    lo_b, hi_b = np.array([16.0, 11.0, 4.0]), np.array([17.6, 14.0, 9.0])
    hco3 = rng.uniform(lo_b[sev], hi_b[sev])
    lo_k, hi_k = np.array([3.2, 3.5, 6.6]), np.array([5.0, 5.2, 9.0])
    bhb0 = rng.uniform(lo_k[sev], hi_k[sev])
    g0 = np.where(eu, _u(rng, 7.0, 10.9, k), np.clip(np.exp(rng.normal(np.log(27), 0.3, k)), 12, 60))
    k0 = np.clip(rng.normal(5.0, 0.6, k), 3.6, 7.0)
    na0 = np.clip(rng.normal(133, 4, k), 120, 150)
    creat0 = pe["creat"][p] * _u(rng, 1.1, 2.2, k)
    ag_slope = _u(rng, 1.6, 2.6, k)
    med = np.array([hh["delay_median_h"] for hh in P.HOSPITALS])[h] * MIN_H
    delay = np.round(np.maximum(np.exp(rng.normal(np.log(med), care["delay_lognormal_sigma"])), 6))
    # the first diagnostic blood draw comes 5-40 min after arrival and always before insulin
    onset_off = np.round(np.minimum(_u(rng, 5, 40, k), 0.8 * delay))
    ins = arrival + delay
    onset = arrival + onset_off
    r = P.RESOLUTION
    lhr = r["log_hr"]
    hosp_lhr = np.array([lhr["hospital"][str(i + 1)] for i in range(n_h)])
    lp = np.array([0.0, lhr["moderate"], lhr["severe"]])[sev] + lhr["sglt2i"] * sg \
        + lhr["age_under_18"] * (age < 18) + hosp_lhr[h]
    rho = r["weibull_shape"]
    lam = np.log(2) / r["baseline_median_hours"] ** rho
    t_res = (-np.log(1 - rng.random(k)) / (lam * np.exp(lp))) ** (1 / rho)
    t_res = np.clip(t_res, 0.75, 150.0)
    res_plan = ins + t_res * MIN_H
    died = rng.random(k) < np.array([care["death_share"][s] for s in SEVERITY_NAMES])[sev]
    death_t = np.round(ins + np.maximum(_u(rng, 0.2, 0.9, k) * t_res * MIN_H, 30))
    # kinetics (per hour, from insulin start): the binding criterion resolves exactly at t_res
    ket_binds = rng.random(k) < 0.6
    frac = _u(rng, 0.5, 0.95, k)
    tau_k = np.where(ket_binds, t_res, t_res * frac)
    tau_a = np.where(ket_binds, t_res * frac, t_res)
    kk = np.log((bhb0 - 0.2) / 0.4) / tau_k
    ka = np.log((7.37 - ph0) / 0.07) / tau_a
    # documented resolution: the first draw whose reported values meet resolution (the labs
    # reveal the physiological resolution only at a later draw); clinicians close on it
    lab_key = rng.integers(0, 2**63 - 1, k, dtype=np.int64).astype(np.uint64)
    course = {"hosp": h, "onset": onset, "ins": ins, "bhb0": bhb0, "ph0": ph0, "hco3": hco3,
              "kk": kk, "ka": ka, "lab_key": lab_key}
    doc = _documented(course, np.nonzero(~died)[0], t_res, k)
    premature = ~died & (rng.random(k) < care["closure_before_resolution_share"])
    lo_f, hi_f = care["premature_closure_at_fraction_of_time_to_resolution"]
    lo_a, hi_a = care["closure_after_resolution_hours"]
    # premature: before any reading of the labs (and the body) shows resolution; on time: after
    # every reading does (JBDS pH > 7.3 is the last), so the flag is the same under each
    before = np.fmin(np.fmin(doc["earliest"], doc["standard"]), res_plan)
    after = np.fmax(np.fmax(doc["latest"], doc["standard"]), res_plan)  # fmin / fmax skip NaN
    close = np.where(premature, ins + (before - ins) * _u(rng, lo_f, hi_f, k),
                     after + _u(rng, lo_a, hi_a, k) * MIN_H)
    close = np.round(np.where(died, death_t, close))
    ub = rng.random(k)
    basal_cat = np.where(ub < care["basal_before_closure_share"], 0,
                         np.where(ub < care["basal_before_closure_share"] + care["basal_after_closure_share"], 1, 2))
    basal_cat = np.where(died, 2, basal_cat)
    lo_bb, hi_bb = care["basal_before_closure_hours"]
    basal_t = np.where(basal_cat == 0, close - _u(rng, lo_bb, hi_bb, k) * MIN_H, close + _u(rng, 0.5, 8, k) * MIN_H)
    basal_t = np.round(np.where(basal_cat == 0, np.maximum(basal_t, ins + 15), basal_t))
    basal_cat = np.where((basal_cat == 0) & (basal_t >= close), 1, basal_cat)  # very short infusions
    rebound = premature & (rng.random(k) < np.where(
        basal_cat == 0, care["rebound_share_premature_with_basal"], care["rebound_share_premature_without_basal"]))
    interrupt = ~died & (rng.random(k) < care["infusion_interruption_share"])
    stop1 = np.round(ins + _u(rng, 0.2, 0.7, k) * (close - ins))
    restart = np.round(stop1 + _u(rng, 15, 90, k))
    interrupt &= restart < close - 15
    rb_rise = _u(rng, 0.8, 2.5, k)
    rb_hours = _u(rng, 2, 5, k)
    gt = np.where(eu, _u(rng, 6.0, 8.5, k), _u(rng, 6.5, 10.0, k))
    kg = _u(rng, 0.12, 0.25, k)
    tau_dex = np.where(g0 > 14, np.log(np.maximum(g0 - gt, 1e-3) / np.maximum(14 - gt, 1e-3)) / kg, 0.0)
    hypo = ~died & (rng.random(k) < care["hypoglycaemia_share"])
    tau_hypo = _u(rng, 0.35, 0.85, k) * (close - ins) / MIN_H
    hypok = ~died & (rng.random(k) < care["hypokalaemia_share"])
    kmin = np.where(hypok, _u(rng, 2.7, 3.3, k), _u(rng, 3.6, 4.4, k))
    course = {
        "person": p, "hosp": h, "age": age, "sev": sev, "sglt2": sg, "eu": eu, "ph0": ph0,
        "hco3": hco3, "bhb0": bhb0, "g0": g0, "k0": k0, "na0": na0, "creat0": creat0,
        "ag_slope": ag_slope, "arrival": arrival, "onset": onset, "ins": ins, "t_res": t_res,
        "died": died, "death_t": death_t, "premature": premature, "close": close,
        "basal_cat": basal_cat, "basal_t": basal_t, "rebound": rebound, "interrupt": interrupt,
        "stop1": stop1, "restart": restart, "kk": kk, "ka": ka, "rb_rise": rb_rise,
        "rb_hours": rb_hours, "gt": gt, "kg": kg, "tau_dex": tau_dex, "hypo": hypo,
        "tau_hypo": tau_hypo, "hypok": hypok, "kmin": kmin, "prior": np.full(k, prior),
        "lp_res": lp, "lab_key": lab_key,
    }
    res = np.where(died, np.nan, res_plan)
    if rebound.any():
        res = np.where(rebound, _rebound_resolution(course), res)
        # the rebound delays what the labs document too (the draws up to closure are unchanged)
        ri = np.nonzero(rebound)[0]
        doc_rb = _documented(course, ri, (np.fmax(res, close) - ins) / MIN_H, k)
        for name in doc:
            doc[name][ri] = doc_rb[name][ri]
    course["res"] = np.round(res)
    course["res_doc"] = doc["standard"]
    course["res_doc_latest"] = doc["latest"]
    end_care = np.where(died, death_t, np.fmax(np.maximum(close, course["res"]), doc["latest"]))
    discharge = np.round(np.where(died, death_t, end_care + _u(rng, 12, 60, k) * MIN_H))
    course["discharge"] = discharge
    icu = rng.random(k) < np.array([care["icu_share"][s] for s in SEVERITY_NAMES])[sev]
    icu_start = np.round(arrival + _u(rng, 60, 240, k))
    icu_end = np.round(np.minimum(np.maximum(end_care, icu_start + 240) + _u(rng, 2, 20, k) * MIN_H,
                                  discharge - 60))
    icu &= icu_end > icu_start + 60
    course.update(icu=icu, icu_start=icu_start, icu_end=np.where(died, death_t, icu_end))
    two_visits = np.array([hh["arrival_visit"] == "ER+IP" for hh in P.HOSPITALS])[h]
    admit = np.round(np.minimum(ins + _u(rng, 30, 180, k), discharge - 60))
    two_visits &= admit > arrival + 30
    course.update(two_visits=two_visits, admit=admit)
    # an ICU stay belongs to the inpatient visit: it starts after admission where ER and IP are separate
    icu_start = np.where(two_visits, np.maximum(icu_start, admit), icu_start)
    course["icu_start"] = icu_start
    course["icu"] = icu & (course["icu_end"] > icu_start + 60)
    course["coded"] = rng.random(k) < care["icd_dka_code_share_true_episodes"]
    course["coma"] = (sev == 2) & (rng.random(k) < 0.15)
    course["urine"] = rng.random(k) < care["urine_ketones_at_arrival_share"]
    course["urine_ord"] = rng.choice([1, 2, 3, 4], size=k, p=[0.05, 0.35, 0.40, 0.20])
    course["arterial"] = ((sev == 2) & (rng.random(k) < 0.4)) | (rng.random(k) < 0.05)
    course["lactate"] = rng.random(k) < 0.3
    course["followup"] = ~died & (rng.random(k) < care["follow_up_dka_code_share"])
    course["followup_t"] = np.round(discharge + _u(rng, 7, 13, k) * MIN_D)
    course["kcl"] = rng.random(k) < 0.85
    course["kcl_t"] = np.round(ins + _u(rng, 0, 60, k))
    course["nacl_t"] = np.round(arrival + _u(rng, 0, 30, k))
    course["nacl_end"] = np.round(np.minimum(arrival + _u(rng, 6, 12, k) * MIN_H, discharge))
    course["basal_product"] = rng.random(k) < 0.3
    return course


def acid_base(c: dict[str, np.ndarray], e: np.ndarray, tau: np.ndarray) -> dict[str, np.ndarray]:
    """True ketones, venous pH and bicarbonate of episodes ``e`` at ``tau`` hours from insulin start.

    Before the closure is planned (no ``rebound`` in ``c``) this is the course on the infusion;
    afterwards a rebound after premature closure is included.
    """
    tp = np.maximum(tau, 0.0)
    bhb0, kk, ka, ph0 = c["bhb0"][e], c["kk"][e], c["ka"][e], c["ph0"][e]
    bhb = 0.2 + (bhb0 - 0.2) * np.exp(-kk * tp)
    acid = np.exp(-ka * tp)
    rb = c["rebound"][e] if "rebound" in c else np.zeros(np.shape(e), bool)
    if rb.any():
        tc = (c["close"][e] - c["ins"][e]) / MIN_H
        up = c["rb_hours"][e]
        bhb_c = 0.2 + (bhb0 - 0.2) * np.exp(-kk * tc)
        acid_c = np.exp(-ka * tc)
        peak = bhb_c + c["rb_rise"][e]
        after = tp - tc
        rising = rb & (after > 0) & (after <= up)
        falling = rb & (after > up)
        bhb = np.where(rising, bhb_c + c["rb_rise"][e] * after / up, bhb)
        bhb = np.where(falling, 0.2 + (peak - 0.2) * np.exp(-0.6 * kk * (after - up)), bhb)
        acid = np.where(rising, acid_c, acid)
        acid = np.where(falling, acid_c * np.exp(-0.6 * ka * (after - up)), acid)
    ph = 7.37 - (7.37 - ph0) * acid
    # bicarbonate lags pH (hyperchloraemia on recovery): it recovers as acid ** 0.6
    hco3 = 24.0 - (24.0 - c["hco3"][e]) * acid ** 0.6
    return {"bhb": bhb, "ph": ph, "hco3": hco3}


def state(c: dict[str, np.ndarray], e: np.ndarray, tau: np.ndarray) -> dict[str, np.ndarray]:
    """True (noise-free) physiology of episodes ``e`` at ``tau`` hours from insulin start."""
    tp = np.maximum(tau, 0.0)
    ab = acid_base(c, e, tau)
    bhb, ph, hco3 = ab["bhb"], ab["ph"], ab["hco3"]
    g0, gt = c["g0"][e], c["gt"][e]
    glucose = gt + (g0 - gt) * np.exp(-c["kg"][e] * tp)
    k0, kmin = c["k0"][e], c["kmin"][e]
    tc_h = (c["close"][e] - c["ins"][e]) / MIN_H
    potassium = k0 + (kmin - k0) * (1 - np.exp(-tp / 2.0))
    post = tp - tc_h
    potassium = np.where(post > 0, 4.2 + (potassium - 4.2) * np.exp(-post / 6.0), potassium)
    sodium = c["na0"][e] + (140 - c["na0"][e]) * (1 - np.exp(-tp / 12.0))
    ag = 9.0 + c["ag_slope"][e] * bhb
    chloride = sodium - hco3 - ag
    creat = c["creat0"][e] * (0.55 + 0.45 * np.exp(-tp / 24.0))
    return {"glucose": glucose, "bhb": bhb, "ph": ph, "hco3": hco3, "potassium": potassium,
            "sodium": sodium, "chloride": chloride, "creatinine": creat}


def _rebound_resolution(c: dict[str, np.ndarray]) -> np.ndarray:
    """First time (minutes) true bhb < 0.6 and pH >= 7.3, on a 5-minute grid, for rebound episodes."""
    e = np.nonzero(c["rebound"])[0]
    out = np.full(c["person"].size, np.nan)
    step = 5.0 / 60.0
    grid = np.arange(0, 240.0, step)
    for chunk in np.array_split(e, max(1, e.size // 200)):
        if chunk.size == 0:
            continue
        ee = np.repeat(chunk, grid.size)
        tt = np.tile(grid, chunk.size)
        s = acid_base(c, ee, tt)
        ok = ((s["bhb"] < 0.6) & (s["ph"] >= 7.3)).reshape(chunk.size, grid.size)
        tc = ((c["close"][chunk] - c["ins"][chunk]) / MIN_H)[:, None]
        ok &= grid[None, :] > tc  # resolution comes after the (premature) closure
        first = np.argmax(ok, axis=1)
        found = ok[np.arange(chunk.size), first]
        out[chunk] = np.where(found, c["ins"][chunk] + grid[first] * MIN_H, np.nan)
    return out


def make_episodes(rng: np.random.Generator, pe: dict[str, np.ndarray]) -> dict:
    """DKA episodes of a chunk from the hazard model; recurrences from the same model.

    Parameters
    ----------
    rng : numpy.random.Generator
        The chunk's generator.
    pe : dict of numpy.ndarray
        The chunk's persons (:func:`make_persons`).

    Returns
    -------
    dict
        The episodes' arrays (empty when no one has an episode) and ``death_ep`` (per person).
        ``at_risk`` holds the windows the waiting times were drawn in, one row per person and
        round: ``person`` (local index), ``prior`` (the round, i.e. earlier episodes),
        ``start`` and ``stop`` (minutes) and ``event`` (the window ends in an arrival). Nothing
        writes them; tests compare them with the at-risk time rebuilt from the truth tables.
    """
    n = pe["group"].size
    hz = P.DKA_HAZARD
    base = np.where(pe["group"] == T1, hz["base_per_person_year"]["type1"],
                    np.where(pe["group"] == T2, hz["base_per_person_year"]["type2"], 0.0))
    lp = dka_linear_predictor(pe)
    obs_start = pe["start_day"] * MIN_D
    obs_end = (pe["end_day"] + 1) * MIN_D - 1
    t_cur = obs_start.astype(np.float64)
    active = base > 0
    death_ep = np.full(n, np.nan)
    rounds = []
    windows = []
    b_prior = hz["log_hr"]["per_prior_episode_capped_3"]
    for r in range(MAX_ROUNDS):  # until no one is at risk (a person is never cut off early)
        lam = base * np.exp(lp + b_prior * min(r, 3)) / YEAR
        wait = rng.exponential(size=n) / np.where(lam > 0, lam, 1.0)
        arr = np.floor(t_cur + wait)
        ok = active & (arr < obs_end - 3 * MIN_D)
        at = np.nonzero(active)[0]
        windows.append((at, np.full(at.size, r), t_cur[at].copy(),
                        np.where(ok[at], arr[at], obs_end[at] - 3 * MIN_D), ok[at]))
        idx = np.nonzero(ok)[0]
        active = ok
        if idx.size == 0:
            break
        c = dka_course(rng, idx, arr[idx], pe, r)
        rounds.append(c)
        t_cur[idx] = c["discharge"] + hz["refractory_days_after_discharge"] * MIN_D
        d = c["died"]
        active[idx[d]] = False
        death_ep[idx[d]] = c["death_t"][d]
    if not rounds:
        return {}
    ep = {key: np.concatenate([c[key] for c in rounds]) for key in rounds[0]}
    order = np.lexsort((ep["arrival"], ep["person"]))
    ep = {key: v[order] for key, v in ep.items()}
    ep["death_ep"] = death_ep
    ep["at_risk"] = {key: np.concatenate([w[i] for w in windows])
                     for i, key in enumerate(("person", "prior", "start", "stop", "event"))}
    return ep


# --- mimics -----------------------------------------------------------------------------------
MIMIC_KINDS = tuple(P.MIMICS)


def make_mimics(rng: np.random.Generator, pe: dict[str, np.ndarray],
                busy_person: np.ndarray, busy_start: np.ndarray, busy_end: np.ndarray) -> dict[str, np.ndarray]:
    """Mimic presentations (HHS, AKA, starvation ketosis, lactic acidosis, hyperglycaemia)."""
    grp = pe["group"]
    years = (pe["end_day"] - pe["start_day"] + 1) / 365.25
    persons, kinds, times = [], [], []
    for ki, kind in enumerate(MIMIC_KINDS):
        spec = P.MIMICS[kind]
        elig = np.isin(grp, [GROUP_NAMES.index(g) for g in spec["groups"]])
        cnt = np.where(elig, np.minimum(rng.poisson(spec["rate"] * years), 2), 0)
        o, _w = expand(cnt)
        lo = pe["start_day"][o] * MIN_D
        hi = (pe["end_day"][o] - 6) * MIN_D
        t = np.floor(lo + rng.random(o.size) * np.maximum(hi - lo, 0))
        keep = hi > lo
        persons.append(o[keep]); kinds.append(np.full(keep.sum(), ki)); times.append(t[keep])
    p = np.concatenate(persons)
    kind = np.concatenate(kinds)
    t = np.concatenate(times)
    order = np.lexsort((t, p))
    p, kind, t = p[order], kind[order], t[order]
    # no mimic within 10 days of a DKA stay; at most one presentation in any 10-day window
    margin = 10 * MIN_D
    clash = inside_intervals(p, t, busy_person, busy_start - margin, busy_end + margin)
    prev_same = np.r_[False, (p[1:] == p[:-1]) & (t[1:] - t[:-1] < margin)]
    keep = ~clash & ~prev_same
    p, kind, t = p[keep], kind[keep], t[keep]
    m = p.size
    k = lambda lo, hi: rng.uniform(lo, hi, m)  # noqa: E731
    n_h = len(P.HOSPITALS)
    h = np.where(rng.random(m) < 0.9, pe["home"][p], rng.integers(0, n_h, m))
    # onset values by kind (true venous values)
    g = np.select([kind == 0, kind == 1, kind == 2, kind == 3, kind == 4],
                  [k(34, 60), k(3.0, 8.5), k(3.5, 7.0),
                   np.where(grp[p] > 0, k(6, 20), k(4.5, 9)), k(15, 32)])
    ph = np.select([kind == 0, kind == 1, kind == 2, kind == 3, kind == 4],
                   [k(7.31, 7.42), k(7.05, 7.29), k(7.31, 7.40), k(6.95, 7.25), k(7.33, 7.42)])
    hco3 = np.select([kind == 0, kind == 1, kind == 2, kind == 3, kind == 4],
                     [k(18, 26), k(8, 17), k(18, 23), k(6, 16), k(21, 27)])
    bhb = np.select([kind == 0, kind == 1, kind == 2, kind == 3, kind == 4],
                    [k(0.2, 2.5), k(3.5, 8.0), k(1.0, 4.0), k(0.1, 0.9), k(0.1, 1.2)])
    lactate = np.where(kind == 3, k(6, 15), k(0.8, 2.5))
    na = np.where(kind == 0, k(142, 160), k(132, 142))
    kk = np.clip(rng.normal(4.4, 0.5, m), 3.5, 6.0)
    admitted = (kind == 0) | (kind == 3) | ((kind == 1) & (rng.random(m) < 0.5))
    los = np.where(admitted, k(24, 120), k(4, 10)) * MIN_H
    end = np.round(np.minimum(t + los, (pe["end_day"][p] + 1) * MIN_D - 1))
    iv_insulin = (kind == 0) & (rng.random(m) < 0.7)
    icd_dka = rng.random(m) < np.array([P.MIMICS[x]["icd_dka_share"] for x in MIMIC_KINDS])[kind]
    return {
        "person": p, "kind": kind, "arrival": t, "hosp": h, "g": g, "ph": ph, "hco3": hco3,
        "bhb": bhb, "lactate": lactate, "na": na, "k": kk, "admitted": admitted, "end": end,
        "iv_insulin": iv_insulin, "ins": np.round(t + k(30, 120)),
        "ins_end": np.round(np.minimum(t + k(12, 36) * MIN_H, end)), "icd_dka": icd_dka,
        "icd_other": rng.random(m) < 0.6, "urine": rng.random(m) < 0.5,
        "onset_off": np.round(k(5, 40)), "lactate_drawn": (kind == 3) | (rng.random(m) < 0.2),
    }
