"""Incidence rates: crude rates with exact Poisson limits, direct age standardisation, rate ratios.

- Exact Poisson limits for a count ``d`` (Garwood F. Fiducial limits for the Poisson
  distribution. Biometrika 1936;28:437-442), chi-square form: lower ``chi2(alpha/2, 2d) / 2``,
  upper ``chi2(1 - alpha/2, 2d + 2) / 2``; divided by the person-time for a rate.
- Directly standardised rates with the gamma interval of Fay MP, Feuer EJ. Confidence intervals
  for directly standardized rates: a method based on the gamma distribution. Stat Med
  1997;16:791-801 (the method SEER*Stat uses by default).
- Poisson and negative-binomial (NB2) regression with log person-time offset for rate ratios
  (statsmodels).
"""

from __future__ import annotations

import math
import re
import warnings
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
import statsmodels.api as sm
from scipy import stats as sps

from cohort._errors import InputError
from cohort.stats._common import (
    FrameLike,
    as_list,
    build_design,
    describe_dropped,
    drop_incomplete,
    iter_groups,
    join_notes,
    require_columns,
    to_pandas,
    z_value,
)
from cohort.stats._standard_populations import standard_population

__all__ = [
    "age_standardised_rates",
    "fay_feuer_interval",
    "incidence_rates",
    "parse_age_band",
    "poisson_exact_interval",
    "rate_regression",
]

_BAND = re.compile(r"^\s*(\d+)\s*(?:-\s*(\d+)|\+)\s*$")


def poisson_exact_interval(events: float, *, alpha: float = 0.05) -> tuple[float, float]:
    """Exact (Garwood 1936) confidence limits for the mean of a Poisson count.

    Parameters
    ----------
    events
        Observed count (a whole number >= 0).
    alpha
        1 - confidence level.

    Returns
    -------
    tuple of float
        ``(lower, upper)`` limits for the expected count; lower is 0 when ``events`` is 0.

    Examples
    --------
    >>> [round(v, 3) for v in poisson_exact_interval(0)]
    [0.0, 3.689]
    >>> [round(v, 3) for v in poisson_exact_interval(10)]
    [4.795, 18.39]
    """
    if events < 0 or not float(events).is_integer():
        raise InputError(f"a Poisson count must be a whole number >= 0, got {events!r}.")
    if not 0 < alpha < 1:
        raise InputError(f"`alpha` must be a number in (0, 1), got {alpha!r}.")
    lower = 0.0 if events == 0 else float(sps.chi2.ppf(alpha / 2, 2 * events) / 2)
    upper = float(sps.chi2.ppf(1 - alpha / 2, 2 * events + 2) / 2)
    return lower, upper


def fay_feuer_interval(
    events: np.ndarray, weights: np.ndarray, *, alpha: float = 0.05
) -> dict[str, float]:
    """Directly standardised rate and its Fay and Feuer (1997) gamma interval.

    The rate is ``y = sum w_i d_i`` where ``w_i`` is the standard weight of stratum ``i``
    divided by its person-time; ``v = sum w_i^2 d_i`` and ``w_M = max w_i``. Then
    ``lower = G^-1(alpha/2; y^2/v, v/y)`` and
    ``upper = G^-1(1 - alpha/2; (y + w_M)^2/(v + w_M^2), (v + w_M^2)/(y + w_M))``, with
    ``G^-1(p; shape, scale)`` the gamma quantile (Fay and Feuer 1997, eqs. 3-4). When the
    weights are all equal this is the exact Poisson interval scaled by the weight.

    Parameters
    ----------
    events
        Counts per stratum.
    weights
        Standard weight / person-time per stratum (same length).
    alpha
        1 - confidence level.

    Returns
    -------
    dict
        ``estimate``, ``se`` (``sqrt(v)``), ``lower``, ``upper``.

    Examples
    --------
    >>> import numpy as np
    >>> out = fay_feuer_interval(np.array([10.0]), np.array([0.5]))
    >>> round(out["estimate"], 3), round(out["lower"], 3), round(out["upper"], 3)
    (5.0, 2.398, 9.195)
    """
    d = np.asarray(events, dtype=float)
    w = np.asarray(weights, dtype=float)
    y = float((w * d).sum())
    v = float((w**2 * d).sum())
    wm = float(w.max())
    if y > 0:
        lower = float(sps.gamma.ppf(alpha / 2, y**2 / v, scale=v / y))
    else:
        lower = 0.0
    upper = float(
        sps.gamma.ppf(1 - alpha / 2, (y + wm) ** 2 / (v + wm**2), scale=(v + wm**2) / (y + wm))
    )
    return {"estimate": y, "se": math.sqrt(v), "lower": lower, "upper": upper}


def parse_age_band(label: str) -> tuple[int, float]:
    """Parse an age band label into ``(lower, upper)`` years, upper exclusive.

    ``"18-24"`` covers ages 18 to < 25 (whole years, both ends inclusive as written);
    ``"85+"`` covers 85 and over (upper is infinity).

    Examples
    --------
    >>> parse_age_band("18-24"), parse_age_band("85+")
    ((18, 25), (85, inf))
    """
    match = _BAND.match(str(label))
    if not match:
        raise InputError(
            f"age band {label!r} is not of the form 'a-b' (e.g. '18-24') or 'a+' (e.g. '85+')."
        )
    lower = int(match.group(1))
    upper = float("inf") if match.group(2) is None else int(match.group(2)) + 1
    if upper <= lower:
        raise InputError(f"age band {label!r} ends before it starts.")
    return lower, upper


def _band_weights(bands: Sequence[str], standard: pl.DataFrame) -> dict[str, float]:
    """Standard population share of each study band, apportioning partly covered bands.

    A standard band only partly inside a study band gives it the covered share of its
    population, assuming ages spread evenly within the band (common practice). The result is
    scaled to sum to 1 over the study bands (the standard restricted to the ages studied).
    """
    spans = {band: parse_age_band(band) for band in bands}
    ordered = sorted(spans.items(), key=lambda kv: kv[1][0])
    for (b1, (_, u1)), (b2, (l2, _)) in zip(ordered, ordered[1:], strict=False):
        if l2 < u1:
            raise InputError(f"age bands {b1!r} and {b2!r} overlap.")
    out: dict[str, float] = {}
    for band, (lo, hi) in spans.items():
        total = 0.0
        for row in standard.iter_rows(named=True):
            s_lo = float(row["age_lower"])
            s_hi = float("inf") if row["age_upper"] is None else float(row["age_upper"])
            overlap_lo, overlap_hi = max(lo, s_lo), min(hi, s_hi)
            if overlap_hi <= overlap_lo:
                continue
            if math.isinf(s_hi):
                if not math.isinf(hi) or lo > s_lo:
                    raise InputError(
                        f"age band {band!r} cuts the open standard band {row['age_band']!r}; "
                        f"make the study's last band start at {int(s_lo)} or below and stay "
                        "open ('a+')."
                    )
                total += float(row["population"])
            else:
                total += float(row["population"]) * (overlap_hi - overlap_lo) / (s_hi - s_lo)
        if total == 0:
            raise InputError(f"age band {band!r} lies outside the standard population.")
        out[band] = total
    grand = sum(out.values())
    return {band: value / grand for band, value in out.items()}


def _counts(frame: pd.DataFrame, events_col: str, person_years_col: str, *, table: str) -> None:
    d = frame[events_col].astype(float)
    bad = (d < 0) | (d % 1 != 0)
    if bad.any():
        raise InputError(
            f"table `{table}`: `{events_col}` must hold whole numbers >= 0; {int(bad.sum())} "
            f"row(s) do not (e.g. {d[bad].iloc[0]!r})."
        )
    py = frame[person_years_col].astype(float)
    if (py < 0).any():
        raise InputError(
            f"table `{table}`: `{person_years_col}` is negative in {int((py < 0).sum())} row(s)."
        )


def incidence_rates(
    person_time: FrameLike,
    *,
    events_col: str = "episodes",
    person_years_col: str = "person_years",
    by: str | Sequence[str] | None = None,
    per: float = 1000.0,
    alpha: float = 0.05,
    table: str = "person_time",
) -> pl.DataFrame:
    """Crude incidence rates per ``per`` person-years with exact Poisson limits, by strata.

    Parameters
    ----------
    person_time
        Counts and person-time, one row per stratum (or finer; rows are summed within ``by``),
        e.g. the features stage's person-time table (``episodes``, ``person_years`` by
        ``calendar_year``, ``age_band``, ``sex``, ``diabetes_type``).
    events_col, person_years_col
        Column names.
    by
        Column(s) to report rates by (e.g. ``["sex"]``, ``["diabetes_type", "year"]``);
        ``None`` for one overall rate.
    per
        Rate multiplier (1,000 person-years by default).
    alpha
        1 - confidence level.
    table
        Name of the input used in error messages.

    Returns
    -------
    polars.DataFrame
        The ``by`` columns, ``events``, ``person_years``, ``estimate``, ``lower``, ``upper``,
        ``per``, ``method``.

    Examples
    --------
    >>> import polars as pl
    >>> t = pl.DataFrame({"sex": ["F", "M"], "episodes": [10, 0], "person_years": [2000.0, 1000.0]})
    >>> incidence_rates(t, by="sex")["upper"].round(3).to_list()
    [9.195, 3.689]
    """
    groups = as_list(by)
    frame = to_pandas(person_time, table=table)
    frame, dropped = drop_incomplete(frame, [events_col, person_years_col, *groups],
                                     table=table)
    _counts(frame, events_col, person_years_col, table=table)
    rows = []
    for values, sub in iter_groups(frame, groups):
        d = float(sub[events_col].sum())
        py = float(sub[person_years_col].sum())
        if py <= 0:
            raise InputError(
                f"table `{table}`: stratum {dict(zip(groups, values, strict=True))} has "
                "no person-time; a rate needs a positive denominator."
            )
        lo, hi = poisson_exact_interval(d, alpha=alpha)
        rows.append(
            {
                **dict(zip(groups, values, strict=True)),
                "events": int(d),
                "person_years": py,
                "estimate": d / py * per,
                "lower": lo / py * per,
                "upper": hi / py * per,
                "per": per,
                "method": "exact Poisson (Garwood 1936, chi-square form)",
            }
        )
    return pl.DataFrame(rows).with_columns(
        pl.lit(describe_dropped(dropped), dtype=pl.String).alias("left_out")
    )


def age_standardised_rates(
    person_time: FrameLike,
    *,
    age_band_col: str = "age_band",
    events_col: str = "episodes",
    person_years_col: str = "person_years",
    by: str | Sequence[str] | None = None,
    standard: str | FrameLike = "esp2013",
    per: float = 1000.0,
    alpha: float = 0.05,
    table: str = "person_time",
) -> pl.DataFrame:
    """Directly age-standardised rates with Fay and Feuer (1997) gamma intervals.

    Study age bands (labels ``'a-b'`` or ``'a+'``) receive the standard population's share of
    their ages; the standard is restricted to the ages studied (weights rescaled to 1), so an
    adult cohort standardises to the adult part of the standard.

    Parameters
    ----------
    person_time
        Counts and person-time by age band (and the ``by`` strata); rows are summed within
        (``by``, band).
    age_band_col, events_col, person_years_col
        Column names.
    by
        Column(s) to report standardised rates by (e.g. ``"sex"``).
    standard
        ``esp2013``, ``who2000``, or a table with ``age_band`` and ``population`` columns.
    per
        Rate multiplier.
    alpha
        1 - confidence level.
    table
        Name of the input used in error messages.

    Returns
    -------
    polars.DataFrame
        The ``by`` columns, ``events``, ``person_years``, ``crude``, ``estimate`` (the
        standardised rate), ``lower``, ``upper``, ``se``, ``per``, ``standard``, ``bands``,
        ``method``, ``note`` (bands left out for lack of person-time).

    Examples
    --------
    >>> import polars as pl
    >>> t = pl.DataFrame({"age_band": ["0-44", "45+"], "episodes": [5, 20],
    ...                   "person_years": [5000.0, 4000.0]})
    >>> # ESP 2013 shares 0.54 and 0.46: (0.54 * 5/5000 + 0.46 * 20/4000) * 1000
    >>> round(age_standardised_rates(t)["estimate"][0], 3)
    2.84
    """
    groups = as_list(by)
    frame = to_pandas(person_time, table=table)
    frame, dropped = drop_incomplete(
        frame, [age_band_col, events_col, person_years_col, *groups], table=table
    )
    _counts(frame, events_col, person_years_col, table=table)
    if isinstance(standard, str):
        std = standard_population(standard)
        std_name = standard
    else:
        std = standard if isinstance(standard, pl.DataFrame) else pl.from_pandas(standard)
        require_columns(std.head(0).to_pandas(), ["age_band", "population"], table="standard")
        spans = [parse_age_band(b) for b in std["age_band"]]
        std = std.with_columns(
            pl.Series("age_lower", [s[0] for s in spans]),
            pl.Series("age_upper", [None if math.isinf(s[1]) else int(s[1]) for s in spans],
                      dtype=pl.Int64),
        )
        std_name = "user-supplied"
    frame[age_band_col] = frame[age_band_col].astype(str)
    rows = []
    for values, sub in iter_groups(frame, groups):
        agg = sub.groupby(age_band_col, sort=True)[[events_col, person_years_col]].sum()
        empty = agg[agg[person_years_col] <= 0]
        bad = empty[empty[events_col] > 0]
        if len(bad):
            raise InputError(
                f"table `{table}`: age band {bad.index[0]!r} has events but no "
                "person-time; check the denominator."
            )
        agg = agg[agg[person_years_col] > 0]
        if agg.empty:
            raise InputError(f"table `{table}`: no age band has person-time.")
        shares = _band_weights(list(agg.index), std)
        w = np.array([shares[b] for b in agg.index]) / agg[person_years_col].to_numpy()
        d = agg[events_col].to_numpy(dtype=float)
        ff = fay_feuer_interval(d, w, alpha=alpha)
        py = float(agg[person_years_col].sum())
        note = (
            f"left out band(s) with no person-time: {', '.join(map(str, empty.index))}"
            if len(empty)
            else None
        )
        rows.append(
            {
                **dict(zip(groups, values, strict=True)),
                "events": int(d.sum()),
                "person_years": py,
                "crude": float(d.sum()) / py * per,
                "estimate": ff["estimate"] * per,
                "lower": ff["lower"] * per,
                "upper": ff["upper"] * per,
                "se": ff["se"] * per,
                "per": per,
                "standard": std_name,
                "bands": len(agg),
                "method": "direct standardisation; Fay and Feuer (1997) gamma interval",
                "note": join_notes(note, describe_dropped(dropped)),
            }
        )
    return pl.DataFrame(rows, schema_overrides={"note": pl.String})


def rate_regression(
    person_time: FrameLike,
    *,
    covariates: Sequence[str],
    events_col: str = "episodes",
    person_years_col: str = "person_years",
    family: str = "poisson",
    reference: dict[str, Any] | None = None,
    alpha: float = 0.05,
    table: str = "person_time",
) -> pl.DataFrame:
    """Rate ratios from Poisson or negative-binomial regression with log person-time offset.

    Parameters
    ----------
    person_time
        Counts and person-time per stratum (or per person).
    covariates
        Columns entered in the model; text columns become indicators against a reference.
    events_col, person_years_col
        Column names.
    family
        ``poisson`` (GLM; the Pearson dispersion is reported, values well above 1 point to
        over-dispersion) or ``negative_binomial`` (NB2, dispersion ``alpha`` estimated by
        maximum likelihood and reported as its own row).
    reference, alpha, table
        As elsewhere (``table`` names the input in error messages).

    Returns
    -------
    polars.DataFrame
        One row per term (intercept first, its estimate the baseline rate per person-year):
        ``model``, ``term``, ``covariate``, ``reference``, ``coef``, ``se``, ``estimate``
        (rate ratio), ``lower``, ``upper``, ``z``, ``p``, ``n``, ``events``,
        ``person_years``, ``dispersion``, ``warning``, ``left_out``.

    Examples
    --------
    >>> import polars as pl
    >>> t = pl.DataFrame({"sex": ["F", "M"], "episodes": [30, 10],
    ...                   "person_years": [1000.0, 1000.0]})
    >>> fit = rate_regression(t, covariates=["sex"], reference={"sex": "M"})
    >>> round(fit.filter(term="sex=F")["estimate"][0], 6)
    3.0
    """
    if family not in ("poisson", "negative_binomial"):
        raise InputError(
            f"`family` must be 'poisson' or 'negative_binomial', got {family!r}."
        )
    covariates = list(covariates)
    frame = to_pandas(person_time, table=table)
    frame, dropped = drop_incomplete(frame, [events_col, person_years_col, *covariates],
                                     table=table)
    _counts(frame, events_col, person_years_col, table=table)
    frame = frame[frame[person_years_col] > 0].reset_index(drop=True)
    y = frame[events_col].astype(float).to_numpy()
    if y.sum() == 0:
        raise InputError(f"table `{table}`: no events; a rate ratio cannot be estimated.")
    design = build_design(frame, covariates, table=table, reference=reference)
    exog = sm.add_constant(design.matrix, has_constant="add").rename(columns={"const": "intercept"})
    log_py = np.log(frame[person_years_col].astype(float).to_numpy())
    caught: list[str] = []
    with warnings.catch_warnings(record=True) as records:
        warnings.simplefilter("always")
        if family == "poisson":
            result = sm.GLM(y, exog, family=sm.families.Poisson(), offset=log_py).fit()
            dispersion = float(result.pearson_chi2 / result.df_resid) if result.df_resid else None
            params, bse, zs, ps = result.params, result.bse, result.tvalues, result.pvalues
        else:
            result = sm.NegativeBinomial(y, exog, offset=log_py, loglike_method="nb2").fit(
                disp=0, maxiter=200
            )
            params, bse, zs, ps = result.params, result.bse, result.tvalues, result.pvalues
            dispersion = float(params["alpha"])
    for record in records:
        caught.append(str(record.message).splitlines()[0])
    for term in design.terms:
        level_events = y[design.matrix[term].to_numpy() == 1].sum() if np.isin(
            design.matrix[term].to_numpy(), [0, 1]).all() else None
        if level_events == 0:
            raise InputError(
                f"table `{table}`: no events where `{term}` = 1, so its rate ratio is 0 "
                "with no finite log; pool that level with another."
            )
    z = z_value(alpha)
    warning = join_notes(*(sorted(set(caught)) if caught else []))
    rows = []
    terms = ["intercept", *design.terms] + (["alpha"] if family == "negative_binomial" else [])
    for term in terms:
        coef = float(params[term])
        s = float(bse[term])
        is_alpha = term == "alpha"
        rows.append(
            {
                "model": f"{family} rate regression",
                "term": "alpha (NB2 dispersion)" if is_alpha else term,
                "covariate": design.covariate_of.get(term),
                "reference": design.reference_of.get(term),
                "coef": coef,
                "se": s,
                "estimate": coef if is_alpha else float(np.exp(coef)),
                "lower": coef - z * s if is_alpha else float(np.exp(coef - z * s)),
                "upper": coef + z * s if is_alpha else float(np.exp(coef + z * s)),
                "z": float(zs[term]),
                "p": float(ps[term]),
                "n": len(y),
                "events": int(y.sum()),
                "person_years": float(frame[person_years_col].sum()),
                "dispersion": dispersion,
                "warning": warning,
                "left_out": describe_dropped(dropped),
            }
        )
    return pl.DataFrame(rows, schema_overrides={"covariate": pl.String, "reference": pl.String,
                                               "dispersion": pl.Float64, "warning": pl.String,
                                               "left_out": pl.String})
