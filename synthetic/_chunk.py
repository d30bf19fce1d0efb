"""One chunk of persons -> the rows of every CDM table, the truth rows and the fault counts."""

from __future__ import annotations

import numpy as np

from synthetic import _params as P
from synthetic._labcodes import CodeTable
from synthetic._people import (
    MIN_D, MIN_H, T1, T2, dka_linear_predictor, expand, inside_intervals, lab_jitter, make_episodes,
    make_mimics, make_persons, reported_acid_base, state,
)
from synthetic._vocab import cid

US_PER_MIN = 60_000_000
EPOCH_US = P.EPOCH_DAY * 86_400_000_000


class Ids:
    """Running id counters per table (chunks run in order, so ids are deterministic)."""

    def __init__(self) -> None:
        self.next: dict[str, int] = {}

    def take(self, table: str, n: int) -> np.ndarray:
        start = self.next.get(table, 1)
        self.next[table] = start + n
        return np.arange(start, start + n, dtype=np.int64)


def _ts(t_min: np.ndarray) -> np.ndarray:
    """Minutes since 2019-01-01 -> int64 microseconds since 1970 (whole minutes)."""
    return EPOCH_US + np.round(t_min).astype(np.int64) * US_PER_MIN


def _day(t_min: np.ndarray) -> np.ndarray:
    """Minutes since 2019-01-01 -> days since 1970."""
    return P.EPOCH_DAY + np.floor(np.asarray(t_min) / MIN_D).astype(np.int64)


class _Rows:
    """Collects measurement rows as column blocks."""

    cols = ("person", "code", "t", "canon", "visit", "vdetail", "ordinal", "source", "hosp")

    def __init__(self) -> None:
        self.blocks: list[dict[str, np.ndarray]] = []

    def add(self, person, code, t, canon, visit, source, hosp, vdetail=None, ordinal=None) -> None:
        person = np.asarray(person)
        n = person.size
        if n == 0:
            return
        self.blocks.append({
            "person": person.astype(np.int64), "code": np.broadcast_to(code, n).astype(np.int32),
            "t": np.asarray(t, dtype=np.float64), "canon": np.asarray(canon, dtype=np.float64),
            "visit": np.broadcast_to(visit, n).astype(np.int64),
            "vdetail": np.full(n, -1, np.int64) if vdetail is None else vdetail.astype(np.int64),
            "ordinal": np.full(n, -1, np.int8) if ordinal is None else ordinal.astype(np.int8),
            "source": np.full(n, source, np.int8), "hosp": np.broadcast_to(hosp, n).astype(np.int8),
        })

    def concat(self) -> dict[str, np.ndarray]:
        if not self.blocks:
            return {c: np.zeros(0) for c in self.cols}
        return {c: np.concatenate([b[c] for b in self.blocks]) for c in self.cols}


SRC_ROUTINE, SRC_EPISODE, SRC_MIMIC, SRC_AFTER_DEATH = 0, 1, 2, 3

# routine panels: (name, analytes, inclusion probability none / type 1 / type 2)
PANELS = [
    ("u_and_e", ["sodium", "potassium", "chloride", "bicarbonate", "creatinine", "urea_nitrogen",
                 "egfr", "glucose_plasma"], (0.95, 0.95, 0.95)),
    ("blood_count", ["haemoglobin", "wbc", "platelets", "haematocrit", "mcv"], (0.6, 0.6, 0.6)),
    ("liver", ["alt", "ast", "alp", "bilirubin", "albumin"], (0.35, 0.35, 0.35)),
    ("lipids", ["cholesterol", "hdl", "ldl", "triglycerides"], (0.2, 0.35, 0.35)),
    ("hba1c", ["hba1c"], (0.05, 0.9, 0.9)),
    ("thyroid", ["tsh"], (0.1, 0.1, 0.1)),
    ("crp", ["crp"], (0.2, 0.2, 0.2)),
    ("urine_acr", ["uacr"], (0.02, 0.3, 0.3)),
]

# generic canonical distributions of routine analytes: (kind, a, b, lo, hi)
#   normal: mean a, sd b; lognormal: median a, log-sd b
_DIST = {
    "sodium": ("n", 140, 2.5, 125, 150), "potassium": ("n", 4.3, 0.4, 3.0, 6.0),
    "chloride": ("n", 103, 2.5, 92, 112), "bicarbonate": ("n", 25, 2, 17, 32),
    "urea_nitrogen": ("n", 15, 4, 4, 40), "haemoglobin": ("n", 13.8, 1.4, 8, 19),
    "wbc": ("l", 7.0, 0.25, 2, 25), "platelets": ("n", 260, 60, 60, 600),
    "haematocrit": ("n", 41, 4, 25, 58), "mcv": ("n", 90, 5, 70, 110),
    "alt": ("l", 22, 0.4, 5, 400), "ast": ("l", 24, 0.35, 5, 400), "alp": ("n", 80, 20, 25, 300),
    "bilirubin": ("l", 0.6, 0.4, 0.1, 6), "albumin": ("n", 4.2, 0.35, 2.5, 5.4),
    "cholesterol": ("n", 190, 35, 90, 350), "hdl": ("n", 52, 12, 20, 110),
    "ldl": ("n", 110, 30, 30, 250), "triglycerides": ("l", 130, 0.4, 30, 900),
    "tsh": ("l", 1.8, 0.5, 0.05, 20), "crp": ("l", 3, 1.0, 0.1, 200), "uacr": ("l", 15, 1.0, 1, 2000),
    "lactate": ("n", 1.2, 0.3, 0.4, 3),
}


def _draw(rng, name, size):
    kind, a, b, lo, hi = _DIST[name]
    if kind == "n":
        v = rng.normal(a, b, size)
    else:
        v = np.exp(rng.normal(np.log(a), b, size))
    return np.clip(v, lo, hi)


def generate_chunk(rng: np.random.Generator, first_person_id: int, n: int, ids: Ids,
                   codes: CodeTable) -> dict:
    """Generate every table's rows for persons first_person_id .. first_person_id + n - 1."""
    pe = make_persons(rng, n)
    pid = first_person_id + np.arange(n, dtype=np.int64)
    grp = pe["group"]
    ep = make_episodes(rng, pe)
    E = ep["person"].size if ep else 0

    # ---- deaths and the end of observation ------------------------------------------------
    death_day = np.where(pe["bg_death"], pe["end_day"], -1).astype(np.int64)
    death_t = np.full(n, np.nan)  # only for deaths in hospital
    if E:
        last_dis = np.full(n, -np.inf)
        np.maximum.at(last_dis, ep["person"], ep["discharge"])
        has = np.isfinite(last_dis)
        dis_day = np.where(has, np.floor(last_dis / MIN_D), -1).astype(np.int64)
        ext = has & (dis_day + 1 > pe["end_day"])
        pe["end_day"] = np.where(ext, dis_day + 1, pe["end_day"])
        death_day = np.where(ext & (death_day >= 0), dis_day + 1, death_day)
        d = ~np.isnan(ep["death_ep"])
        death_t[d] = ep["death_ep"][d]
        death_day = np.where(d, np.floor(np.nan_to_num(ep["death_ep"]) / MIN_D).astype(np.int64), death_day)
        pe["end_day"] = np.where(d, death_day, pe["end_day"])
    died = death_day >= 0

    # ---- busy intervals (DKA stays) and mimics ---------------------------------------------
    busy_p = ep["person"] if E else np.zeros(0, np.int64)
    busy_s = ep["arrival"] if E else np.zeros(0)
    busy_e = ep["discharge"] if E else np.zeros(0)
    mm = make_mimics(rng, pe, busy_p, busy_s, busy_e)
    M = mm["person"].size

    rows = _Rows()
    visits: list[dict] = []
    vdetails: list[dict] = []
    drugs: list[dict] = []
    conds: list[dict] = []
    hosp_cs = np.array([h["care_site_id"] for h in P.HOSPITALS], dtype=np.int64)

    def add_visit(person, concept, start, end, hosp, preceding=None):
        k = np.asarray(person).size
        vid = ids.take("visit_occurrence", k)
        if k:
            visits.append({"id": vid, "person": np.asarray(person), "concept": np.broadcast_to(concept, k),
                           "start": np.asarray(start, float), "end": np.asarray(end, float),
                           "care_site": hosp_cs[np.asarray(hosp)],
                           "preceding": np.full(k, -1) if preceding is None else preceding})
        return vid

    def add_drug(person, concept, start, end, route, visit, source, *, datetime=True,
                 days_supply=None, quantity=None, sig=-1):
        k = np.asarray(person).size
        if not k:
            return
        drugs.append({"id": ids.take("drug_exposure", k), "person": np.asarray(person),
                      "concept": np.broadcast_to(concept, k).astype(np.int64),
                      "start": np.asarray(start, float), "end": np.asarray(end, float),
                      "route": np.broadcast_to(route, k).astype(np.int64),
                      "visit": np.broadcast_to(visit, k).astype(np.int64),
                      "source": np.broadcast_to(source, k).astype(np.int32),
                      "datetime": np.broadcast_to(datetime, k).astype(bool),
                      "days": np.full(k, -1) if days_supply is None else np.broadcast_to(days_supply, k),
                      "qty": np.full(k, np.nan) if quantity is None else np.broadcast_to(quantity, k),
                      "sig": np.broadcast_to(sig, k).astype(np.int32)})

    def add_cond(person, concept, source_concept, source_label, t, visit, datetime=True):
        k = np.asarray(person).size
        if not k:
            return
        conds.append({"id": ids.take("condition_occurrence", k), "person": np.asarray(person),
                      "concept": np.broadcast_to(concept, k).astype(np.int64),
                      "source_concept": np.broadcast_to(source_concept, k).astype(np.int64),
                      "label": np.broadcast_to(source_label, k).astype(np.int32),
                      "t": np.asarray(t, float), "visit": np.broadcast_to(visit, k).astype(np.int64),
                      "datetime": np.broadcast_to(datetime, k).astype(bool)})

    # concept ids used below
    V = {k: cid("Visit", k) for k in ("IP", "ER", "ERIP", "OP", "ICU")}
    route_iv, route_sc, route_po = cid("SNOMED", "47625008"), cid("SNOMED", "34206005"), cid("SNOMED", "26643006")
    DRUG_LABELS = ["INSULIN INFUSION", "INSULIN GLARGINE", "INSULIN DETEMIR", "INSULIN DEGLUDEC",
                   "DAPAGLIFLOZIN", "EMPAGLIFLOZIN", "CANAGLIFLOZIN", "ERTUGLIFLOZIN", "METFORMIN",
                   "GLUCOSE 10% IV", "POTASSIUM CHLORIDE IV", "SODIUM CHLORIDE 0.9% IV"]
    SIG_LABELS = ["fixed rate 0.1 unit/kg/h", "once daily", "once daily with food", "titrate to glucose"]
    COND_LABELS = ["E10.9", "E11.9", "E10.65", "E11.65", "E10.10", "E10.11", "E11.10", "E11.11",
                   "E13.10", "E11.00", "E87.2", "I10"]
    cond_src = {c: cid("ICD10CM", c) for c in COND_LABELS}
    sn_dka, sn_t1, sn_t2, sn_htn = (cid("SNOMED", x) for x in ("420422005", "46635009", "44054006", "38341003"))
    basal_ing = np.array([cid("RxNorm", x) for x in ("274783", "139825", "1670007")])
    basal_prod = np.array([cid("HVH Formulary", x) for x in ("HVH-INS-0201", "HVH-INS-0301", "HVH-INS-0401")])
    sglt2_ing = np.array([cid("RxNorm", x) for x in ("1488564", "1545653", "1373458", "1992672")])
    sglt2_prod = np.array([cid("HVH Formulary", x) for x in ("HVH-SGL-0101", "HVH-SGL-0201", "HVH-SGL-0301")] + [0])
    infusion_drug = np.array([cid(*hh["insulin_drug"]) for hh in P.HOSPITALS])

    truth: dict[str, np.ndarray] = {}
    rec_hypo = np.zeros(E, bool)
    rec_hypok = np.zeros(E, bool)
    # ================================ DKA episodes ============================================
    if E:
        p, h = ep["person"], ep["hosp"]
        arr, ins, close, dis = ep["arrival"], ep["ins"], ep["close"], ep["discharge"]
        two = ep["two_visits"]
        v_first = add_visit(p, np.where(two, V["ER"], V["ERIP"]), arr, np.where(two, ep["admit"], dis), h)
        # inpatient visits of the two-visit hospitals
        ti = np.nonzero(two)[0]
        v_ip = np.full(E, -1, np.int64)
        v_ip[ti] = add_visit(p[ti], V["IP"], ep["admit"][ti], dis[ti], h[ti], preceding=v_first[ti])
        v_main = np.where(two, v_ip, v_first)
        # ICU stays
        ii = np.nonzero(ep["icu"])[0]
        vd_id = np.full(E, -1, np.int64)
        if ii.size:
            vd_id[ii] = ids.take("visit_detail", ii.size)
            vdetails.append({"id": vd_id[ii], "person": p[ii], "start": ep["icu_start"][ii],
                             "end": ep["icu_end"][ii], "care_site": hosp_cs[h[ii]], "visit": v_main[ii]})

        def visit_at(e, t):
            return np.where(two[e] & (t >= ep["admit"][e]), v_ip[e], v_first[e])

        def vdetail_at(e, t):
            inside = ep["icu"][e] & (t >= ep["icu_start"][e]) & (t <= ep["icu_end"][e])
            return np.where(inside, vd_id[e], -1)

        # hourly slots from onset to the end of close monitoring
        end_mon = np.fmax(np.where(np.isnan(ep["res"]), close, np.maximum(close, ep["res"])), ep["res_doc_latest"]) + 6 * MIN_H
        end_mon = np.minimum(end_mon, np.where(ep["died"], ep["death_t"], dis))
        nh = np.floor((end_mon - ep["onset"]) / MIN_H).astype(np.int64) + 1
        nh = np.maximum(nh, 1)
        e, j = expand(nh)
        # draw times and ketone / gas noise as the course read them (documented resolution)
        t = ep["onset"][e] + j * MIN_H + lab_jitter(ep["lab_key"][e], j)
        t = np.minimum(t, end_mon[e])
        tau = (t - ins[e]) / MIN_H
        s = state(ep, e, tau)
        drawn = reported_acid_base(ep, e, j, t)
        vis = visit_at(e, t)
        vdt = vdetail_at(e, t)
        pe_e = p[e]
        he = h[e]
        # capillary glucose every hour
        g = s["glucose"] * (1 + rng.normal(0, 0.05, e.size))
        # the planted hypoglycaemia falls on an hourly reading inside the infusion
        j_lo = np.ceil((ins - ep["onset"] + 5) / MIN_H)
        j_hi = np.floor((close - ep["onset"] - 5) / MIN_H)
        j_h = np.clip(np.round((ins - ep["onset"]) / MIN_H + ep["tau_hypo"]), j_lo, j_hi).astype(np.int64)
        j_h = np.where(j_hi >= j_lo, j_h, -1)
        is_hypo_row = ep["hypo"][e] & (j == j_h[e])
        g = np.where(is_hypo_row, rng.uniform(2.6, 3.9, e.size), np.maximum(g, 4.3))
        rows.add(pe_e, codes.of("glucose_capillary", he), t, g, vis, SRC_EPISODE, he, vdt)
        on_inf = (t >= ins[e]) & (t <= close[e])
        np.logical_or.at(rec_hypo, e[on_inf & (g < 4.0)], True)
        # ketones
        every = np.array([hh["bhb_every_h"] for hh in P.HOSPITALS])[he]
        m = (j % every) == 0
        b = drawn["bhb"]
        rows.add(pe_e[m], codes.of("bhb", he[m]), t[m], b[m], vis[m], SRC_EPISODE, he[m], vdt[m])
        # gases and electrolytes every 2-4 h
        gas_every = np.array([hh["gas_every_h"] for hh in P.HOSPITALS])[he]
        m = (j % gas_every) == 0
        ge, gt_, gh, gv, gd, gj = e[m], t[m], he[m], vis[m], vdt[m], j[m]
        gs = {k: v[m] for k, v in s.items()}
        gdrawn = {k: v[m] for k, v in drawn.items()}
        k_ = gs["potassium"] + rng.normal(0, 0.12, ge.size)
        k_ = np.where(ep["hypok"][ge], np.maximum(k_, 2.3), np.maximum(k_, 3.5))
        na = np.round(gs["sodium"] + rng.normal(0, 1.2, ge.size))
        hc = gdrawn["hco3"]
        cl = np.round(gs["chloride"] + rng.normal(0, 1.2, ge.size))
        ph = gdrawn["ph"]
        art = ep["arterial"][ge] & (gj == 0)
        child = ep["age"][ge] < 18
        ph_code = np.where(art, codes.of("ph_arterial", gh),
                           np.where(child, codes.of("ph_children", gh), codes.of("ph_venous", gh)))
        ph = np.where(art, ph + 0.03, ph)  # arterial about 0.03 above venous (Kelly 2010; CLINICAL.md)
        pg = ge.size
        rows.add(p[ge], ph_code, gt_, ph, gv, SRC_EPISODE, gh, gd)
        rows.add(p[ge], codes.of("bicarbonate", gh), gt_ + 1, hc + np.where(codes.analyte_is_tco2(gh), 1.0, 0.0),
                 gv, SRC_EPISODE, gh, gd)
        rows.add(p[ge], codes.of("sodium", gh), gt_ + 1, na, gv, SRC_EPISODE, gh, gd)
        rows.add(p[ge], codes.of("potassium", gh), gt_ + 1, k_, gv, SRC_EPISODE, gh, gd)
        rows.add(p[ge], codes.of("chloride", gh), gt_ + 1, cl, gv, SRC_EPISODE, gh, gd)
        # the gas analyser's own bicarbonate: venous about 1 mmol/L above serum, arterial about
        # 1 below venous (Kelly 2010 / 2013 meta-analyses; CLINICAL.md)
        bgc = codes.of("bicarbonate_gas", gh)
        mb = (bgc >= 0) & ~art
        rows.add(p[ge][mb], bgc[mb], gt_[mb], (hc + 1.0)[mb], gv[mb], SRC_EPISODE, gh[mb], gd[mb])
        rows.add(p[ge][art], codes.of("bicarbonate_arterial", gh[art]), gt_[art], (hc - 1.0)[art], gv[art],
                 SRC_EPISODE, gh[art], gd[art])
        on_inf_g = (gt_ >= ins[ge]) & (gt_ <= close[ge])
        np.logical_or.at(rec_hypok, ge[on_inf_g & (np.round(k_, 1) < 3.5)], True)
        agc = codes.of("anion_gap", gh)
        ma = agc >= 0
        rows.add(p[ge][ma], agc[ma], gt_[ma] + 1, (na - cl - hc)[ma], gv[ma], SRC_EPISODE, gh[ma], gd[ma])
        ggc = codes.of("glucose_gas", gh)
        mg = ggc >= 0
        gg = np.maximum(gs["glucose"] * (1 + rng.normal(0, 0.03, pg)), 4.3)
        rows.add(p[ge][mg], ggc[mg], gt_[mg], gg[mg], gv[mg], SRC_EPISODE, gh[mg], gd[mg])
        # arrival-only laboratory tests
        m0 = j == 0
        e0, t0, h0, v0, d0 = e[m0], t[m0], he[m0], vis[m0], vdt[m0]
        s0 = {k: v[m0] for k, v in s.items()}
        rows.add(p[e0], codes.of("glucose_plasma", h0), t0 + 2, s0["glucose"] * (1 + rng.normal(0, 0.02, e0.size)),
                 v0, SRC_EPISODE, h0, d0)
        rows.add(p[e0], codes.of("creatinine", h0), t0 + 2, s0["creatinine"], v0, SRC_EPISODE, h0, d0)
        for name in ("haemoglobin", "wbc", "platelets", "urea_nitrogen"):
            val = _draw(rng, name, e0.size) * (1.6 if name in ("wbc", "urea_nitrogen") else 1.0)
            rows.add(p[e0], codes.of(name, h0), t0 + 2, val, v0, SRC_EPISODE, h0, d0)
        ml = ep["lactate"][e0]
        rows.add(p[e0][ml], codes.of("lactate", h0[ml]), t0[ml] + 2, _draw(rng, "lactate", ml.sum()) * 1.5,
                 v0[ml], SRC_EPISODE, h0[ml], d0[ml])
        mu = ep["urine"][e0]
        rows.add(p[e0][mu], codes.of("urine_ketones", h0[mu]), t0[mu] + 20, np.full(mu.sum(), np.nan),
                 v0[mu], SRC_EPISODE, h0[mu], d0[mu], ordinal=ep["urine_ord"][e0][mu])
        # daily laboratory tests until discharge
        nd = np.maximum(np.floor((dis - end_mon) / MIN_D).astype(np.int64), 0)
        de, dj = expand(nd)
        td = end_mon[de] + (dj + 1) * MIN_D - rng.integers(0, 120, de.size)
        td = np.minimum(td, dis[de] - 30)
        dh = h[de]
        dvis = visit_at(de, td)
        ddt = vdetail_at(de, td)
        sd = state(ep, de, (td - ins[de]) / MIN_H)
        for name, val in (("glucose_plasma", np.clip(rng.normal(9, 2.2, de.size), 4.3, 20)),
                          ("sodium", np.round(np.clip(rng.normal(139, 2.5, de.size), 128, 150))),
                          ("potassium", np.clip(rng.normal(4.2, 0.35, de.size), 3.5, 5.8)),
                          ("bicarbonate", np.round(np.clip(sd["hco3"] + rng.normal(0, 1, de.size), 14, 30))),
                          ("creatinine", sd["creatinine"]),
                          ("haemoglobin", _draw(rng, "haemoglobin", de.size))):
            rows.add(p[de], codes.of(name, dh), td, val, dvis, SRC_EPISODE, dh, ddt)

        # ---- drugs of the stay ------------------------------------------------------------
        itr = ep["interrupt"]
        first_end = np.where(itr, ep["stop1"], close)
        add_drug(p, infusion_drug[h], ins, first_end, route_iv, visit_at(np.arange(E), ins), 0, sig=0)
        ri = np.nonzero(itr)[0]
        add_drug(p[ri], infusion_drug[h[ri]], ep["restart"][ri], close[ri], route_iv,
                 visit_at(ri, ep["restart"][ri]), 0, sig=0)
        bi = np.nonzero(ep["basal_cat"] < 2)[0]
        bk = pe["basal_kind"][p[bi]]
        bconc = np.where(ep["basal_product"][bi], basal_prod[bk], basal_ing[bk])
        bt = ep["basal_t"][bi]
        bt_ok = bt < dis[bi]
        bi, bconc, bk, bt = bi[bt_ok], bconc[bt_ok], bk[bt_ok], bt[bt_ok]
        add_drug(p[bi], bconc, bt, bt, route_sc, visit_at(bi, bt), 1 + bk, quantity=np.round(rng.uniform(10, 30, bi.size)),
                 sig=1)
        dx = np.nonzero(ins + ep["tau_dex"] * MIN_H < close)[0]
        dx_t = np.round(ins[dx] + ep["tau_dex"][dx] * MIN_H)
        add_drug(p[dx], cid("RxNorm", "4850"), dx_t, close[dx], route_iv, visit_at(dx, dx_t), 9)
        kx = np.nonzero(ep["kcl"] & (ep["kcl_t"] < close))[0]
        add_drug(p[kx], cid("RxNorm", "8591"), ep["kcl_t"][kx], close[kx], route_iv, visit_at(kx, ep["kcl_t"][kx]), 10)
        add_drug(p, cid("RxNorm", "9863"), ep["nacl_t"], ep["nacl_end"], route_iv, v_first, 11)

        # ---- ICD-10-CM DKA codes on the stay ------------------------------------------------
        ci = np.nonzero(ep["coded"])[0]
        t1 = grp[p[ci]] == T1
        coma = ep["coma"][ci]
        lab = np.where(t1, np.where(coma, 5, 4), np.where(coma, 7, 6))
        src = np.array([cond_src[c] for c in COND_LABELS])[lab]
        add_cond(p[ci], sn_dka, src, lab, np.where(two[ci], ep["admit"][ci], arr[ci]), v_main[ci])
        fi = np.nonzero(ep["followup"] & (ep["followup_t"] < (pe["end_day"][p] + 1) * MIN_D - 600))[0]
        if fi.size:
            clash = inside_intervals(p[fi], ep["followup_t"][fi], busy_p, busy_s - MIN_D, busy_e + MIN_D)
            clash |= inside_intervals(p[fi], ep["followup_t"][fi], mm["person"], mm["arrival"] - MIN_D, mm["end"] + MIN_D)
            fi = fi[~clash]
        fu_t = np.floor(ep["followup_t"][fi] / MIN_D) * MIN_D + 10 * MIN_H
        v_fu = add_visit(p[fi], V["OP"], fu_t, fu_t + 30, pe["home"][p[fi]])
        fu_busy = (p[fi], fu_t, fu_t + 30)
        t1f = grp[p[fi]] == T1
        labf = np.where(t1f, 4, 6)
        add_cond(p[fi], sn_dka, np.array([cond_src[c] for c in COND_LABELS])[labf], labf, fu_t, v_fu)

        # ---- truth rows --------------------------------------------------------------------
        last_end = close
        hb = np.where(ep["basal_cat"] < 2, (close - ep["basal_t"]) / MIN_H, np.nan)
        truth = {
            "kind": np.zeros(E, np.int8), "person": p, "hosp": h, "visit": v_first, "visit_ip": v_main,
            "arrival": arr, "onset": ep["onset"], "res": ep["res"], "res_doc": ep["res_doc"], "discharge": dis,
            "sev": ep["sev"], "g0": ep["g0"], "ph0": ep["ph0"], "hco3": ep["hco3"], "bhb0": ep["bhb0"],
            "eu": ep["eu"], "ins": ins, "ins_end": last_end, "inf_rows": 1 + itr.astype(np.int64),
            "premature": ep["premature"], "basal_before": ep["basal_cat"] == 0,
            "basal_hours": hb, "hypo": rec_hypo, "hypok": rec_hypok, "rebound": ep["rebound"],
            "died": ep["died"], "coded": ep["coded"], "age": ep["age"], "prior": ep["prior"],
            "icu": ep["icu"], "planned_hypo": ep["hypo"], "planned_hypok": ep["hypok"],
            "sglt2": ep["sglt2"], "lp_res": ep["lp_res"],
        }

    # ================================ mimics ==================================================
    if M:
        p, h, kind = mm["person"], mm["hosp"], mm["kind"]
        arr, end = mm["arrival"], mm["end"]
        vconc = np.where(mm["admitted"], V["ERIP"], V["ER"])
        v_m = add_visit(p, vconc, arr, end, h)
        n_sets = np.where(mm["admitted"], 4, 3)
        me, mj = expand(n_sets)
        offs = np.array([0.0, 2.5, 6.0, 12.0]) * MIN_H
        tm = arr[me] + mm["onset_off"][me] + offs[mj] + np.where(mj > 0, rng.integers(-20, 21, me.size), 0)
        tm = np.minimum(tm, end[me] - 5)
        rec = np.array([1.0, 0.7, 0.45, 0.2])[mj]  # fraction of the way from normal that remains
        hm, pm, vm = h[me], p[me], v_m[me]
        kd = kind[me]
        norm = {"g": np.where(grp[pm] > 0, 9.0, 5.5), "ph": 7.37, "hco3": 24.0, "bhb": 0.2, "lactate": 1.1}
        val = {k: norm[k] + (mm[k][me] - norm[k]) * rec for k in norm}
        rows.add(pm, codes.of("glucose_plasma", hm), tm + 2, val["g"] * (1 + rng.normal(0, 0.02, me.size)), vm, SRC_MIMIC, hm)
        rows.add(pm, codes.of("glucose_capillary", hm), tm, val["g"] * (1 + rng.normal(0, 0.05, me.size)), vm, SRC_MIMIC, hm)
        rows.add(pm, codes.of("bhb", hm), tm, np.maximum(val["bhb"] + rng.normal(0, 0.05, me.size), 0), vm, SRC_MIMIC, hm)
        rows.add(pm, codes.of("ph_venous", hm), tm, val["ph"] + rng.normal(0, 0.01, me.size), vm, SRC_MIMIC, hm)
        hcm = np.round(val["hco3"] + rng.normal(0, 0.6, me.size))
        rows.add(pm, codes.of("bicarbonate", hm), tm + 1, hcm + np.where(codes.analyte_is_tco2(hm), 1.0, 0.0), vm, SRC_MIMIC, hm)
        nam = np.round(mm["na"][me] + rng.normal(0, 1, me.size))
        agm = 9 + 2.0 * val["bhb"] + np.where(kd == 3, val["lactate"] - 1, 0)
        clm = np.round(nam - hcm - agm)
        rows.add(pm, codes.of("sodium", hm), tm + 1, nam, vm, SRC_MIMIC, hm)
        rows.add(pm, codes.of("chloride", hm), tm + 1, clm, vm, SRC_MIMIC, hm)
        rows.add(pm, codes.of("potassium", hm), tm + 1, mm["k"][me] + rng.normal(0, 0.1, me.size), vm, SRC_MIMIC, hm)
        agc = codes.of("anion_gap", hm)
        ma = agc >= 0
        rows.add(pm[ma], agc[ma], tm[ma] + 1, (nam - clm - hcm)[ma], vm[ma], SRC_MIMIC, hm[ma])
        ml = mm["lactate_drawn"][me]
        rows.add(pm[ml], codes.of("lactate", hm[ml]), tm[ml] + 2, val["lactate"][ml], vm[ml], SRC_MIMIC, hm[ml])
        mu = mm["urine"][me] & (mj == 0)
        uo = np.select([kd == 0, kd == 1, kd == 2, kd == 3, kd == 4],
                       [rng.integers(0, 2, me.size), rng.integers(1, 4, me.size), rng.integers(1, 4, me.size),
                        np.zeros(me.size, int), rng.integers(0, 2, me.size)])
        rows.add(pm[mu], codes.of("urine_ketones", hm[mu]), tm[mu] + 20, np.full(mu.sum(), np.nan), vm[mu],
                 SRC_MIMIC, hm[mu], ordinal=uo[mu])
        xi = np.nonzero(mm["iv_insulin"] & (mm["ins_end"] > mm["ins"]))[0]
        add_drug(p[xi], infusion_drug[h[xi]], mm["ins"][xi], mm["ins_end"][xi], route_iv, v_m[xi], 0, sig=0)
        # codes: the mimic's own code, or (mislabel) a DKA code
        dk = mm["icd_dka"]
        lab_dka = np.where(grp[p] == T1, 4, np.where(grp[p] == T2, 6, 8))
        di = np.nonzero(dk)[0]
        add_cond(p[di], sn_dka, np.array([cond_src[c] for c in COND_LABELS])[lab_dka[di]], lab_dka[di], arr[di], v_m[di])
        own = np.select([kind == 0, kind == 3, kind == 4], [9, 10, np.where(grp[p] == T1, 2, 3)], -1)
        oi = np.nonzero(~dk & mm["icd_other"] & (own >= 0))[0]
        own_c = np.where(own[oi] == 2, sn_t1, np.where(own[oi] == 3, sn_t2, 0))
        add_cond(p[oi], own_c, np.array([cond_src[c] for c in COND_LABELS])[own[oi]], own[oi], arr[oi], v_m[oi])
        mt = {
            "kind": (kind + 1).astype(np.int8), "person": p, "hosp": h, "visit": v_m, "visit_ip": v_m,
            "arrival": arr, "onset": arr + mm["onset_off"], "res": np.full(M, np.nan), "res_doc": np.full(M, np.nan),
            "discharge": end,
            "sev": np.full(M, -1), "g0": mm["g"], "ph0": mm["ph"], "hco3": mm["hco3"], "bhb0": mm["bhb"],
            "eu": np.zeros(M, bool), "ins": np.where(mm["iv_insulin"], mm["ins"], np.nan),
            "ins_end": np.where(mm["iv_insulin"], mm["ins_end"], np.nan), "inf_rows": mm["iv_insulin"].astype(np.int64),
            "premature": np.zeros(M, bool), "basal_before": np.zeros(M, bool), "basal_hours": np.full(M, np.nan),
            "hypo": np.zeros(M, bool), "hypok": np.zeros(M, bool), "rebound": np.zeros(M, bool),
            "died": np.zeros(M, bool), "coded": dk, "age": (arr - pe["birth_day"][p] * MIN_D) / P.MIN_PER_YEAR,
            "prior": np.full(M, -1), "icu": np.zeros(M, bool), "planned_hypo": np.zeros(M, bool),
            "planned_hypok": np.zeros(M, bool), "sglt2": pe["sglt2"][p], "lp_res": np.full(M, np.nan),
        }
        truth = {k: np.concatenate([truth[k], mt[k]]) for k in mt} if truth else mt

    if not E:
        fu_busy = (np.zeros(0, np.int64), np.zeros(0), np.zeros(0))
    busy_all_p = np.concatenate([busy_p, mm["person"], fu_busy[0]])
    busy_all_s = np.concatenate([busy_s, mm["arrival"], fu_busy[1]])
    busy_all_e = np.concatenate([busy_e, mm["end"], fu_busy[2]])

    # ================================ routine outpatient care ================================
    rate = np.array([P.POPULATION["outpatient_lab_visits_per_year"][g] for g in ("none", "type1", "type2")])[grp]
    years = (pe["end_day"] - pe["start_day"] + 1) / 365.25
    nv = np.minimum(rng.poisson(rate * years), 80)
    o, _w = expand(nv)
    day = pe["start_day"][o] + np.floor(rng.random(o.size) * (pe["end_day"][o] - pe["start_day"][o] + 1)).astype(np.int64)
    tv = day * MIN_D + 8 * MIN_H + rng.integers(0, 9 * 60, o.size)
    keep = ~inside_intervals(o, tv, busy_all_p, busy_all_s - MIN_D, busy_all_e + MIN_D)
    order = np.lexsort((tv, o))
    o_s, tv_s = o[order], tv[order]
    # at most one outpatient laboratory visit per person and day
    dup = np.r_[False, (o_s[1:] == o_s[:-1]) & (np.floor(tv_s[1:] / MIN_D) == np.floor(tv_s[:-1] / MIN_D))]
    keep_s = keep[order] & ~dup
    o, tv = o_s[keep_s], tv_s[keep_s]
    hv = pe["home"][o]
    v_op = add_visit(o, V["OP"], tv, tv + 20, hv)
    # panels
    gi = grp[o]
    incl = np.stack([rng.random(o.size) < np.array(pr)[gi] for _name, _an, pr in PANELS], axis=1)
    incl[:, 0] |= ~incl.any(axis=1)  # every visit has at least one test
    vi, pi = np.nonzero(incl)
    lens = np.array([len(an) for _n, an, _p in PANELS])
    flat = [a for _n, an, _p in PANELS for a in an]
    starts = np.cumsum(lens) - lens
    ri, wi = expand(lens[pi])
    row_visit = vi[ri]
    an_idx = starts[pi[ri]] + wi
    names = sorted(set(flat))
    name_of_flat = np.array([names.index(a) for a in flat])
    an = name_of_flat[an_idx]
    rp = o[row_visit]
    rh = hv[row_visit]
    rt = tv[row_visit] + 15
    canon = np.zeros(an.size)
    code = np.zeros(an.size, np.int32)
    for ni, name in enumerate(names):
        mk = an == ni
        k = int(mk.sum())
        if not k:
            continue
        pp = rp[mk]
        if name == "glucose_plasma":
            diab = grp[pp] > 0
            v = np.where(diab, rng.normal(5 + (pe["hba1c"][pp] - 40) * 0.1, 2.2), rng.normal(5.2, 0.6, k))
            v = np.clip(v, 3.3, 25)
        elif name == "hba1c":
            v = np.clip(pe["hba1c"][pp] + rng.normal(0, 5, k), 25, 150)
        elif name == "creatinine":
            v = pe["creat"][pp] * (1 + rng.normal(0, 0.07, k))
        elif name == "egfr":
            v = np.clip(100 * (80 / pe["creat"][pp]) ** 1.1 + rng.normal(0, 4, k), 5, 130)
        else:
            v = _draw(rng, name, k)
        canon[mk] = v
        code[mk] = codes.of(name, rh[mk])
    rows.add(rp, code, rt, canon, v_op[row_visit], SRC_ROUTINE, rh)

    # diabetes and hypertension: a problem-list entry dated the first day of observation (date
    # only, no visit), so diabetes is known before any episode; diabetes codes recur at 30% of
    # outpatient visits
    di = np.nonzero(grp > 0)[0]
    start_t = pe["start_day"] * MIN_D
    dlab = np.where(grp[di] == T1, 0, 1)
    dsn = np.where(grp[di] == T1, sn_t1, sn_t2)
    add_cond(di, dsn, np.array([cond_src[c] for c in COND_LABELS])[dlab], dlab, start_t[di], -1, datetime=False)
    mv = (grp[o] > 0) & (rng.random(o.size) < 0.3)
    ov = np.nonzero(mv)[0]
    hi_a1c = pe["hba1c"][o[ov]] > 75
    lab2 = np.where(grp[o[ov]] == T1, np.where(hi_a1c, 2, 0), np.where(hi_a1c, 3, 1))
    add_cond(o[ov], np.where(grp[o[ov]] == T1, sn_t1, sn_t2), np.array([cond_src[c] for c in COND_LABELS])[lab2],
             lab2, tv[ov], v_op[ov])
    htn = (pe["age_start"] >= 30) & (rng.random(n) < np.where(grp == T2, 0.45, 0.15))
    hi = np.nonzero(htn)[0]
    add_cond(hi, sn_htn, cond_src["I10"], 11, start_t[hi], -1, datetime=False)

    # outpatient prescriptions every ~90 days
    span = pe["end_day"] - pe["start_day"]
    nrx = span // 90 + 1

    def prescriptions(mask, conc_ing, conc_prod, label, route, qty, sig):
        who = np.nonzero(mask)[0]
        oo, ww = expand(nrx[who])
        pp = who[oo]
        sday = np.clip(pe["start_day"][pp] + 90 * ww + rng.integers(-5, 6, oo.size), pe["start_day"][pp], pe["end_day"][pp])
        prod = (conc_prod[pp] > 0) & (rng.random(oo.size) < 0.5)
        conc = np.where(prod, conc_prod[pp], conc_ing[pp])
        add_drug(pp, conc, sday * MIN_D, (sday + 89) * MIN_D, route, -1, label[pp] if np.ndim(label) else label,
                 datetime=False, days_supply=90, quantity=qty, sig=sig)

    bk = pe["basal_kind"]
    prescriptions(pe["basal"], basal_ing[bk], basal_prod[bk], 1 + bk, route_sc, 15.0, 1)
    sk = pe["sglt2_kind"]
    prescriptions(pe["sglt2"], sglt2_ing[sk], sglt2_prod[sk], 4 + sk, route_po, 90.0, 2)
    met = np.full(n, cid("RxNorm", "6809"))
    prescriptions(pe["metformin"], met, np.zeros(n, np.int64), 8, route_po, 180.0, 2)

    # ---- results dated after death (fault) -------------------------------------------------
    dd = np.nonzero(died & (rng.random(n) < P.FAULTS["after_death_share_of_deceased"]))[0]
    if dd.size:
        cnt = rng.integers(1, 3, dd.size)
        ao, aw = expand(cnt)
        ap = dd[ao]
        aday = death_day[ap] + 1 + 15 * aw + rng.integers(0, 15, ao.size)  # distinct days
        ok = aday < P.N_DAYS
        ap, aday = ap[ok], aday[ok]
        ah = pe["home"][ap]
        which = rng.integers(0, 2, ap.size)
        acode = np.where(which == 0, codes.of("creatinine", ah), codes.of("haemoglobin", ah))
        aval = np.where(which == 0, pe["creat"][ap], _draw(rng, "haemoglobin", ap.size))
        rows.add(ap, acode, aday * MIN_D + 9 * MIN_H + rng.integers(0, 120, ap.size), aval, -1, SRC_AFTER_DEATH, ah)

    return {
        "pe": pe, "pid": pid, "death_day": death_day, "death_t": death_t, "died": died,
        "rows": rows.concat(), "visits": visits, "vdetails": vdetails, "drugs": drugs, "conds": conds,
        "truth": truth, "n_episodes": E, "lp": dka_linear_predictor(pe),
        "drug_labels": DRUG_LABELS, "sig_labels": SIG_LABELS, "cond_labels": COND_LABELS,
    }
