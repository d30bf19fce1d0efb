"""Planted hazard ratios of the synthetic generator are recovered by a Cox model (issue 2).

The generator draws times by inverting the cumulative hazard of a proportional-hazards model
(Bender R, Augustin T, Blettner M. Generating survival times to simulate Cox proportional
hazards models. Stat Med 2005;24:1713-1723): exponential waiting times for DKA onset and
recurrence, Weibull times for resolution. A Cox model (lifelines CoxPHFitter, partial
likelihood; Cox DR, J R Stat Soc B 1972) fitted to the truth tables must then recover the
planted log-hazard ratios of truth/effects.json within 3 standard errors.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from synthetic import generate_extract

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def truth(tmp_path_factory: pytest.TempPathFactory) -> dict:
    out = tmp_path_factory.mktemp("synth_effects") / "out"
    s = generate_extract(persons=30_000, seed=5, out=out, chunk_persons=10_000, progress=False)
    return {
        "summary": s,
        "episodes": pd.read_parquet(s.truth_dir / "episodes.parquet"),
        "persons": pd.read_parquet(s.truth_dir / "persons.parquet"),
        "effects": json.loads((s.truth_dir / "effects.json").read_text()),
    }


def _check(fit, planted: dict[str, float]) -> None:
    for name, beta in planted.items():
        est, se = fit.params_[name], fit.standard_errors_[name]
        assert abs(est - beta) <= 3 * se, f"{name}: estimated {est:.3f} (se {se:.3f}), planted {beta}"


def test_time_to_resolution_log_hazard_ratios(truth: dict) -> None:
    from lifelines import CoxPHFitter

    ep = truth["episodes"]
    ep = ep[(ep.kind == "dka") & ~ep.died & ~ep.has_rebound.astype(bool)].copy()  # planned times
    lhr = truth["effects"]["resolution"]["log_hr"]
    df = pd.DataFrame({
        "t": ep.hours_insulin_to_resolution, "e": 1,
        "moderate": (ep.severity == "moderate").astype(float), "severe": (ep.severity == "severe").astype(float),
        "sglt2i": ep.has_sglt2i.astype(float), "age_under_18": (ep.age_years < 18).astype(float),
        "site": ep.care_site_id,
    })
    fit = CoxPHFitter().fit(df, duration_col="t", event_col="e", strata=["site"])
    _check(fit, {k: lhr[k] for k in ("moderate", "severe", "sglt2i", "age_under_18")})


def _covariates(persons: pd.DataFrame) -> pd.DataFrame:
    age = persons.age_years_at_observation_start
    return pd.DataFrame({
        "person_id": persons.person_id,
        "missed_insulin": persons.has_missed_insulin.astype(float),
        "age_under_18": (age < 18).astype(float),
        "age_18_to_25": ((age >= 18) & (age < 25)).astype(float),
        "hba1c_per_10_mmol_mol_above_64": (persons.hba1c_mmol_mol - 64) / 10,
        "sglt2i": persons.has_sglt2i.astype(float),
        "female": (persons.sex == "F").astype(float),
        "type": persons.diabetes_type,
    })


def test_dka_onset_and_recurrence_log_hazard_ratios(truth: dict) -> None:
    from lifelines import CoxPHFitter

    persons = truth["persons"]
    persons = persons[persons.diabetes_type != "none"]
    ep = truth["episodes"]
    ep = ep[ep.kind == "dka"].sort_values(["person_id", "arrival_datetime"])
    refractory = pd.Timedelta(days=truth["effects"]["dka_hazard"]["refractory_days_after_discharge"])
    # gap-time rows: at risk from observation start, then from 14 days after each discharge,
    # until the next arrival or 3 days before the end of observation (the generator's window)
    starts = pd.DataFrame({"person_id": persons.person_id,
                           "start": pd.to_datetime(persons.observation_start_date), "prior": 0})
    after = pd.DataFrame({"person_id": ep.person_id, "start": ep.discharge_datetime + refractory,
                          "prior": ep.prior_episodes + 1, "died": ep.died})
    after = after[~after.died].drop(columns="died")
    risk = pd.concat([starts, after]).sort_values(["person_id", "start"]).reset_index(drop=True)
    nxt = pd.DataFrame({"person_id": ep.person_id, "prior": ep.prior_episodes, "arrival": ep.arrival_datetime})
    risk = risk.merge(nxt, on=["person_id", "prior"], how="left")
    end = persons.set_index("person_id").observation_end_date
    risk["censor"] = pd.to_datetime(risk.person_id.map(end)) - pd.Timedelta(days=3)
    risk["e"] = risk.arrival.notna().astype(int)
    stop = risk.arrival.where(risk.arrival.notna(), risk.censor)
    risk["t"] = (stop - risk.start).dt.total_seconds() / 86400
    risk = risk[risk.t > 0]
    risk["prior_capped_3"] = np.minimum(risk.prior, 3).astype(float)
    df = risk.merge(_covariates(persons), on="person_id")[
        ["t", "e", "prior_capped_3", "missed_insulin", "age_under_18", "age_18_to_25",
         "hba1c_per_10_mmol_mol_above_64", "sglt2i", "female", "type"]]
    fit = CoxPHFitter().fit(df, duration_col="t", event_col="e", strata=["type"])
    lhr = truth["effects"]["dka_hazard"]["log_hr"]
    planted = {k: lhr[k] for k in ("missed_insulin", "age_under_18", "age_18_to_25",
                                   "hba1c_per_10_mmol_mol_above_64", "sglt2i", "female")}
    planted["prior_capped_3"] = lhr["per_prior_episode_capped_3"]
    _check(fit, planted)


def test_fault_counts_hold_at_a_larger_scale(truth: dict) -> None:
    # the same counting as the fast test, on 30,000 persons (no accidental duplicates etc.)
    import duckdb

    from tests.test_synthetic import _count_faults

    s = truth["summary"]
    con = duckdb.connect()
    for path in list(s.extract_dir.glob("*.parquet")) + list(s.truth_dir.glob("*.parquet")):
        name = path.stem if path.parent == s.extract_dir else f"truth_{path.stem}"
        con.execute(f"create view {name} as select * from read_parquet('{path}')")
    declared = json.loads((s.truth_dir / "faults.json").read_text())["counts"]
    assert _count_faults(con) == declared


def test_premature_closure_share_is_recovered_end_to_end_issue_2_4(tmp_path) -> None:
    """The demo pipeline (synth -> episodes -> features) recovers the planted share of premature
    closures, judged against the resolution the labs document (issues 2 and 4).

    Premature closure is an audit standard of JBDS 2023 ("The management of diabetic
    ketoacidosis in adults", Joint British Diabetes Societies for Inpatient Care; resolution:
    ketones < 0.6 mmol/L and venous pH > 7.3) and is read here under that definition and under the
    2024 consensus report (Umpierrez GE et al., Diabetes Care 2024;47:1257-1275; ketones < 0.6
    and pH >= 7.3 or bicarbonate >= 18). The observed share among episodes with an infusion end
    and a resolution is binomial around the planted share: tolerance 3 standard errors,
    sqrt(p (1 - p) / n), of the planted p.
    """
    import math
    import subprocess
    import sys

    import polars as pl

    out = tmp_path / "demo"
    done = subprocess.run(
        [sys.executable, "-m", "cohort.cli", "demo", "--persons", "5000", "--out", str(out), "--force", "--quiet"],
        capture_output=True, text=True, check=False,
    )
    assert done.returncode == 0, done.stderr[-2000:]
    planted = json.loads((out / "truth" / "effects.json").read_text())["care"]["closure_before_resolution_share"]
    features = pl.read_parquet(out / "features" / "episode_features.parquet")
    truth = pl.read_parquet(out / "truth" / "episodes.parquet").filter(pl.col("kind") == "dka")
    for definition in ("consensus-2024", "jbds-2023"):
        judged = features.filter(
            (pl.col("definition") == definition)
            & pl.col("insulin_end_datetime").is_not_null()
            & pl.col("resolution_datetime").is_not_null()
        )
        n = judged.height
        assert n >= 200, (definition, n)
        share = judged["is_premature_closure"].mean()
        se = math.sqrt(planted * (1 - planted) / n)
        assert abs(share - planted) <= 3 * se, (definition, share, planted, n)
        # episode by episode, the pipeline's flag is the truth's (matched on person and onset)
        matched = judged.join(truth, on="person_id", suffix="_truth").filter(
            (pl.col("onset_datetime") - pl.col("onset_datetime_truth")).abs() < pl.duration(hours=3)
        )
        assert matched.height >= 0.95 * n, (definition, matched.height, n)
        agree = (matched["is_premature_closure"] == matched["is_premature_closure_truth"]).mean()
        assert agree >= 0.98, (definition, agree)
