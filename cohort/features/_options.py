"""Options of the feature builders: every timing choice and clinical threshold, with its reason.

Clinical numbers come from /work/shared/CLINICAL.md (tags there: [S] confirmed, [M] from memory);
the rest are this tool's own choices, documented here and in the README's data dictionary.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields

from cohort._errors import InputError

__all__ = ["FeatureOptions", "options_from_pairs"]

_DIABETES_TIES = ("type1", "type2")


@dataclass(frozen=True, kw_only=True)
class FeatureOptions:
    """Keyword-only options of :func:`cohort.features.build_features`.

    Parameters
    ----------
    link_hours_before_onset
        An intravenous insulin infusion belongs to an episode when it starts between
        ``onset - link_hours_before_onset`` and ``end + link_hours_after_end``. Default 12 h:
        onset is the time of the first diagnostic lab draw, and an infusion started on a
        bedside ketone reading before the laboratory result is still treating that episode
        (choice of this tool).
    link_hours_after_end
        Default 24 h, so that an infusion restarted for rebound ketosis after resolution (which
        does not open a new episode inside the episode gap) is linked to the episode it follows
        (choice of this tool). When windows of two episodes of one person overlap, the infusion
        goes to the episode with the later onset.
    restart_gap_hours
        Infusion rows of one episode separated by more than this many hours (end of one to start
        of the next) are separate runs: a closure and a restart. Shorter gaps (bag or syringe
        changes recorded as new rows) are the same run. Default 1 h (common practice).
    basal_hours_before_closure, basal_hours_after_closure
        A subcutaneous basal insulin dose is "near closure" when it starts between
        ``closure - basal_hours_before_closure`` and ``closure + basal_hours_after_closure``.
        Defaults 24 h before (JBDS advises continuing the usual once-daily long-acting insulin
        during the infusion, so the dose of the previous day counts [M]) and 6 h after (a later
        dose is not the switch dose; choice of this tool).
    basal_overlap_hours
        Standard for the subcutaneous-to-intravenous overlap: the basal dose at least this many
        hours before closure. Default 0.5 h (JBDS: stop the infusion 30-60 min after the
        subcutaneous dose [M]; ADA 2009: overlap 1-2 h [M]).
    hypoglycaemia_mmol_l
        Glucose below this is hypoglycaemia. Default 4.0 mmol/L (JBDS [M]).
    hypokalaemia_mmol_l
        Potassium below this is hypokalaemia. Default 3.5 mmol/L (2024 consensus: hold insulin if
        K < 3.5 [S]; JBDS severity marker K < 3.5 [S]).
    ketone_fall_per_hour, bicarbonate_rise_per_hour, glucose_fall_per_hour
        Course targets on treatment (JBDS: ketones fall >= 0.5 mmol/L/h, venous bicarbonate
        rises >= 3.0 mmol/L/h, capillary glucose falls >= 3.0 mmol/L/h [S]).
    course_hours
        The course is measured from the baseline value to the last value within this many hours
        of the infusion start. Default 6 h (choice of this tool; the targets are hourly).
    course_baseline_hours_before, course_baseline_hours_after
        Baseline: the last value in ``[start - before, start]``; if none, the first value in
        ``(start, start + after]``. Defaults 4 h and 1 h (choice of this tool).
    course_min_interval_hours
        The follow-up value must be at least this long after the baseline value, so that one
        noisy pair minutes apart does not decide the rate. Default 1 h (choice of this tool).
    monitoring_interval_hours
        Monitoring standard: a glucose and a ketone reading in every interval of this length
        from the infusion start (JBDS: hourly capillary glucose and ketones [S]). Default 1 h.
    monitoring_share_target
        An episode meets the monitoring standard when the share of complete intervals on the
        infusion with a reading is at least this. Default 1.0 (every hour; lower it to audit a
        more lenient reading).
    insulin_target_hours
        Standard: infusion started within this many hours of arrival. Default 1 h (JBDS: start
        the fixed-rate infusion within the first hour [M]).
    resolution_target_hours
        Standard: resolved within this many hours of onset. Default 24 h (JBDS: resolved in most
        people by 24 h [S]).
    visit_chain_hours
        Emergency and inpatient visits of one person that follow each other within this many
        hours form one hospital stay (an ER visit then an inpatient admission); arrival is the
        stay's first start and discharge its last end. Default 2 h (common practice: the
        transfer is recorded as adjacent visits, the gap tolerates clock mismatch).
    hba1c_lookback_days
        HbA1c at onset: the latest result in the prior 365 days (default 365, as the issue asks).
    sglt2_grace_days
        An SGLT2 inhibitor counts as "at onset" when an exposure covers the onset or ended at most
        this many days before it. Default 3 days (the drug's ketogenic effect outlasts the last
        dose; regulators advise stopping at least 3 days before surgery [M]).
    sglt2_default_days
        Length given to an SGLT2 inhibitor exposure with no end and no days_supply. Default 30
        days (one month's supply; common practice).
    diabetes_type_tie
        Diabetes type from condition codes: the type with the most distinct coded days on or
        before the episode's end wins; a tie between type 1 and type 2 goes to this type.
        Default ``"type1"`` (DKA is chiefly a type 1 complication; choice of this tool).

    Examples
    --------
    >>> FeatureOptions(restart_gap_hours=2.0).restart_gap_hours
    2.0
    """

    link_hours_before_onset: float = 12.0
    link_hours_after_end: float = 24.0
    restart_gap_hours: float = 1.0
    basal_hours_before_closure: float = 24.0
    basal_hours_after_closure: float = 6.0
    basal_overlap_hours: float = 0.5
    hypoglycaemia_mmol_l: float = 4.0
    hypokalaemia_mmol_l: float = 3.5
    ketone_fall_per_hour: float = 0.5
    bicarbonate_rise_per_hour: float = 3.0
    glucose_fall_per_hour: float = 3.0
    course_hours: float = 6.0
    course_baseline_hours_before: float = 4.0
    course_baseline_hours_after: float = 1.0
    course_min_interval_hours: float = 1.0
    monitoring_interval_hours: float = 1.0
    monitoring_share_target: float = 1.0
    insulin_target_hours: float = 1.0
    resolution_target_hours: float = 24.0
    visit_chain_hours: float = 2.0
    hba1c_lookback_days: float = 365.0
    sglt2_grace_days: float = 3.0
    sglt2_default_days: float = 30.0
    diabetes_type_tie: str = "type1"

    def __post_init__(self) -> None:
        for field in fields(self):
            value = getattr(self, field.name)
            if field.name == "diabetes_type_tie":
                if value not in _DIABETES_TIES:
                    msg = (
                        f"feature option `diabetes_type_tie` must be one of "
                        f"{', '.join(_DIABETES_TIES)}; got {value!r}"
                    )
                    raise InputError(msg)
                continue
            if isinstance(value, bool) or not isinstance(value, int | float):
                msg = f"feature option `{field.name}` must be a number; got {value!r}"
                raise InputError(msg)
            if not math.isfinite(value) or value < 0:
                msg = f"feature option `{field.name}` must be a finite number >= 0; got {value!r}"
                raise InputError(msg)
        positive = ("monitoring_interval_hours", "course_hours")
        for name in positive:
            if getattr(self, name) <= 0:
                msg = f"feature option `{name}` must be greater than 0; got {getattr(self, name)!r}"
                raise InputError(msg)
        if self.monitoring_share_target > 1:
            msg = (
                "feature option `monitoring_share_target` is a share in [0, 1]; "
                f"got {self.monitoring_share_target!r}"
            )
            raise InputError(msg)


def options_from_pairs(pairs: list[str] | tuple[str, ...]) -> FeatureOptions:
    """Build :class:`FeatureOptions` from ``name=value`` strings (for a command line).

    Unknown names are refused with the closest known one; values are read as numbers except
    ``diabetes_type_tie``.

    Examples
    --------
    >>> options_from_pairs(["restart_gap_hours=2", "diabetes_type_tie=type2"]).restart_gap_hours
    2.0
    >>> options_from_pairs(["restart_gap=2"])
    Traceback (most recent call last):
    ...
    cohort._errors.InputError: unknown feature option `restart_gap`; did you mean `restart_gap_hours`? ...
    """
    import difflib

    known = {field.name: field for field in fields(FeatureOptions)}
    values: dict[str, object] = {}
    for pair in pairs:
        name, sep, text = pair.partition("=")
        name, text = name.strip(), text.strip()
        if not sep or not name:
            msg = f"feature option must be written name=value, got {pair!r}"
            raise InputError(msg)
        if name not in known:
            close = difflib.get_close_matches(name, known, n=1)
            hint = f"did you mean `{close[0]}`? " if close else ""
            msg = f"unknown feature option `{name}`; {hint}options are: {', '.join(known)}"
            raise InputError(msg)
        if name == "diabetes_type_tie":
            values[name] = text
            continue
        try:
            values[name] = float(text)
        except ValueError:
            msg = f"feature option `{name}` must be a number, got {text!r}"
            raise InputError(msg) from None
    return FeatureOptions(**values)  # type: ignore[arg-type]
