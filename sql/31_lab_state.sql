-- 31_lab_state: the latest value of every analyte at every lab time point of a person.
-- grain:  one row per (person_id, state_datetime), a time point at which the person has at least
--         one usable result of a state analyte
-- inputs: dka_lab_points (sql/21), dka_person_diabetes (sql/30)
-- output: dka_lab_state (person_id, state_datetime, visit_occurrence_id, known_diabetes, and per
--         analyte dx_<analyte>, rs_<analyte>, rs_<analyte>_datetime)
-- slots:  diagnosis_lookback_hours, resolution_lookback_hours (float hours),
--         anion_gap_pairing_minutes (float minutes), ph_specimens, bicarbonate_specimens (word
--         lists), person_screen (a compiled boolean over the per-person extremes below; `true`
--         keeps everyone), state_analytes (word list: the analytes carried, from
--         cohort.episodes.carried_analytes; the columns of any other analyte stay null)
--
-- Rules (toolkit choices, common practice unless a source is named):
-- * pH and bicarbonate count only from the accepted specimens (the least of the per-specimen
--   columns of dka_lab_points); other analytes from any specimen. A time point is a point of
--   dka_lab_points with at least one value of a state analyte from an accepted specimen.
-- * Several results of one analyte at one time point were combined by sql/21 (min pH and
--   bicarbonate, the midpoint of the lowest and highest sodium, chloride and potassium, max of the
--   others).
-- * dx_<analyte>: the latest value measured at or before the time point and no more than
--   diagnosis_lookback_hours before it; rs_<analyte> and rs_<analyte>_datetime the same within
--   resolution_lookback_hours (the episode recipes further require rs_<analyte>_datetime > onset).
-- * Anion gap: a derived value Na - (Cl + HCO3) (and (Na + K) - (Cl + HCO3) for
--   anion_gap_with_k), measured sodium, not corrected (CLINICAL.md, formulas), is formed at a time
--   point where the latest sodium, chloride and bicarbonate (and potassium) lie within
--   anion_gap_pairing_minutes of each other and one of them is new; it is carried forward like a
--   measured value. A REPORTED anion gap wins over the derived one whenever the reported one lies
--   inside the look-back (the laboratory's own figure is the one clinicians read).
-- * known_diabetes: a diabetes condition record (dka_person_diabetes) on or before the time point.
-- * Carry-forward: the macro carry_forward (cohort/_macros.py) gives, per analyte, the latest
--   non-null value at or before the time point and its time; the look-back is then checked on
--   that time. DuckDB runs last_value(... ignore nulls) over one window; every other engine the
--   portable count-then-first-value form (a running count of non-null values splits a person's
--   rows into groups that each start at a value, read by an equi-join on (person, count)); both
--   forms give the same rows (tests/test_macros.py, tests/test_lab_state.py against a
--   plain-Python reference, the engine equivalence tests). No ASOF join or LATERAL.
-- * state_analytes: an analyte not in the list still makes a time point (the rows do not depend
--   on the list) but is not carried (the macro's `only`) and its columns are null.
-- * person_screen drops persons who can never meet a diagnosis (a monotone relaxation of the
--   diagnostic criteria over each person's extremes of the time-point values, built by
--   cohort.episodes); it changes no row of a person kept. The extremes read dka_lab_points
--   directly rather than the CTE of time points: a CTE read twice is materialised by DuckDB.

with

person_diabetes as (
    select
        dka_person_diabetes.person_id,
        dka_person_diabetes.first_diabetes_datetime
    from dka_person_diabetes
),

person_extremes as (
    select
        dka_lab_points.person_id,
        min(dka_lab_points.glucose) as min_glucose,
        max(dka_lab_points.glucose) as max_glucose,
        min(least(
                    case when 'arterial' in {{ ph_specimens }} then dka_lab_points.ph_arterial end,
                    case when 'venous' in {{ ph_specimens }} then dka_lab_points.ph_venous end,
                    case when 'capillary' in {{ ph_specimens }} then dka_lab_points.ph_capillary end,
                    case when 'unspecified' in {{ ph_specimens }} then dka_lab_points.ph_unspecified end
                )) as min_ph,
        max(least(
                    case when 'arterial' in {{ ph_specimens }} then dka_lab_points.ph_arterial end,
                    case when 'venous' in {{ ph_specimens }} then dka_lab_points.ph_venous end,
                    case when 'capillary' in {{ ph_specimens }} then dka_lab_points.ph_capillary end,
                    case when 'unspecified' in {{ ph_specimens }} then dka_lab_points.ph_unspecified end
                )) as max_ph,
        min(least(
                    case when 'serum' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_serum end,
                    case when 'blood' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_blood end,
                    case when 'arterial' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_arterial end,
                    case when 'venous' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_venous end,
                    case when 'total_co2' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_total_co2 end
                )) as min_bicarbonate,
        max(least(
                    case when 'serum' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_serum end,
                    case when 'blood' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_blood end,
                    case when 'arterial' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_arterial end,
                    case when 'venous' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_venous end,
                    case when 'total_co2' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_total_co2 end
                )) as max_bicarbonate,
        min(dka_lab_points.bhb) as min_bhb,
        max(dka_lab_points.bhb) as max_bhb,
        min(dka_lab_points.urine_ketones) as min_urine_ketones,
        max(dka_lab_points.urine_ketones) as max_urine_ketones,
        min(dka_lab_points.sodium) as min_sodium,
        max(dka_lab_points.sodium) as max_sodium,
        min(dka_lab_points.chloride) as min_chloride,
        max(dka_lab_points.chloride) as max_chloride,
        min(dka_lab_points.potassium) as min_potassium,
        max(dka_lab_points.potassium) as max_potassium,
        min(dka_lab_points.anion_gap) as min_anion_gap,
        max(dka_lab_points.anion_gap) as max_anion_gap,
        min(dka_lab_points.anion_gap_with_k) as min_anion_gap_with_k,
        max(dka_lab_points.anion_gap_with_k) as max_anion_gap_with_k,
        min(dka_lab_points.hba1c) as min_hba1c,
        max(dka_lab_points.hba1c) as max_hba1c,
        min(dka_lab_points.creatinine) as min_creatinine,
        max(dka_lab_points.creatinine) as max_creatinine
    from dka_lab_points
    group by dka_lab_points.person_id
),

screened_persons as (
    select
        person_extremes.person_id
    from person_extremes
    left join person_diabetes
        on person_diabetes.person_id = person_extremes.person_id
    where {{ person_screen }}
),

points as (
    select
        dka_lab_points.person_id,
        dka_lab_points.point_datetime,
        dka_lab_points.visit_occurrence_id,
        dka_lab_points.glucose as glucose,
        least(
            case when 'arterial' in {{ ph_specimens }} then dka_lab_points.ph_arterial end,
            case when 'venous' in {{ ph_specimens }} then dka_lab_points.ph_venous end,
            case when 'capillary' in {{ ph_specimens }} then dka_lab_points.ph_capillary end,
            case when 'unspecified' in {{ ph_specimens }} then dka_lab_points.ph_unspecified end
        ) as ph,
        least(
            case when 'serum' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_serum end,
            case when 'blood' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_blood end,
            case when 'arterial' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_arterial end,
            case when 'venous' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_venous end,
            case when 'total_co2' in {{ bicarbonate_specimens }} then dka_lab_points.bicarbonate_total_co2 end
        ) as bicarbonate,
        dka_lab_points.bhb as bhb,
        dka_lab_points.urine_ketones as urine_ketones,
        dka_lab_points.sodium as sodium,
        dka_lab_points.chloride as chloride,
        dka_lab_points.potassium as potassium,
        dka_lab_points.anion_gap as anion_gap,
        dka_lab_points.anion_gap_with_k as anion_gap_with_k,
        dka_lab_points.hba1c as hba1c,
        dka_lab_points.creatinine as creatinine
    from dka_lab_points
    inner join screened_persons
        on screened_persons.person_id = dka_lab_points.person_id
),

time_points as (
    select
        points.person_id,
        points.point_datetime as state_datetime,
        points.visit_occurrence_id,
        case when 'glucose' in {{ state_analytes }} then points.glucose end as glucose,
        case when 'ph' in {{ state_analytes }} then points.ph end as ph,
        case when 'bicarbonate' in {{ state_analytes }} then points.bicarbonate end as bicarbonate,
        case when 'bhb' in {{ state_analytes }} then points.bhb end as bhb,
        case when 'urine_ketones' in {{ state_analytes }} then points.urine_ketones end as urine_ketones,
        case when 'sodium' in {{ state_analytes }} then points.sodium end as sodium,
        case when 'chloride' in {{ state_analytes }} then points.chloride end as chloride,
        case when 'potassium' in {{ state_analytes }} then points.potassium end as potassium,
        case when 'anion_gap' in {{ state_analytes }} then points.anion_gap end as anion_gap,
        case when 'anion_gap_with_k' in {{ state_analytes }} then points.anion_gap_with_k end as anion_gap_with_k,
        case when 'hba1c' in {{ state_analytes }} then points.hba1c end as hba1c,
        case when 'creatinine' in {{ state_analytes }} then points.creatinine end as creatinine
    from points
    where coalesce(points.glucose, points.ph, points.bicarbonate, points.bhb, points.urine_ketones, points.sodium, points.chloride, points.potassium, points.anion_gap, points.anion_gap_with_k, points.hba1c, points.creatinine) is not null
),

{{ carry_forward(
    name=carried, source=time_points, partition=person_id, order=state_datetime,
    keep=visit_occurrence_id,
    columns=glucose ph bicarbonate bhb urine_ketones sodium chloride potassium anion_gap anion_gap_with_k hba1c creatinine,
    only=state_analytes
) }},

-- carried's columns pass through derived and derived_carried (the macro's keep), so that final
-- reads one CTE: no join back, and carried is read once (DuckDB materialises a CTE read twice)
derived as (
    select
        carried.person_id,
        carried.state_datetime,
        carried.visit_occurrence_id,
        carried.glucose_last,
        carried.glucose_last_datetime,
        carried.ph_last,
        carried.ph_last_datetime,
        carried.bicarbonate_last,
        carried.bicarbonate_last_datetime,
        carried.bhb_last,
        carried.bhb_last_datetime,
        carried.urine_ketones_last,
        carried.urine_ketones_last_datetime,
        carried.sodium_last,
        carried.sodium_last_datetime,
        carried.chloride_last,
        carried.chloride_last_datetime,
        carried.potassium_last,
        carried.potassium_last_datetime,
        carried.anion_gap_last,
        carried.anion_gap_last_datetime,
        carried.anion_gap_with_k_last,
        carried.anion_gap_with_k_last_datetime,
        carried.hba1c_last,
        carried.hba1c_last_datetime,
        carried.creatinine_last,
        carried.creatinine_last_datetime,
        case
            when 'anion_gap' in {{ state_analytes }}
                and carried.sodium_last is not null
                and carried.chloride_last is not null
                and carried.bicarbonate_last is not null
                and greatest(carried.sodium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) <= least(carried.sodium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) + interval '1 minute' * {{ anion_gap_pairing_minutes }}
                and greatest(carried.sodium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) = carried.state_datetime
                then carried.sodium_last - (carried.chloride_last + carried.bicarbonate_last)
        end as derived_anion_gap,
        case
            when 'anion_gap_with_k' in {{ state_analytes }}
                and carried.sodium_last is not null
                and carried.potassium_last is not null
                and carried.chloride_last is not null
                and carried.bicarbonate_last is not null
                and greatest(carried.sodium_last_datetime, carried.potassium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) <= least(carried.sodium_last_datetime, carried.potassium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) + interval '1 minute' * {{ anion_gap_pairing_minutes }}
                and greatest(carried.sodium_last_datetime, carried.potassium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) = carried.state_datetime
                then (carried.sodium_last + carried.potassium_last) - (carried.chloride_last + carried.bicarbonate_last)
        end as derived_anion_gap_with_k
    from carried
),

{{ carry_forward(
    name=derived_carried, source=derived, partition=person_id, order=state_datetime,
    keep=visit_occurrence_id glucose_last glucose_last_datetime ph_last ph_last_datetime bicarbonate_last bicarbonate_last_datetime bhb_last bhb_last_datetime urine_ketones_last urine_ketones_last_datetime sodium_last sodium_last_datetime chloride_last chloride_last_datetime potassium_last potassium_last_datetime anion_gap_last anion_gap_last_datetime anion_gap_with_k_last anion_gap_with_k_last_datetime hba1c_last hba1c_last_datetime creatinine_last creatinine_last_datetime,
    columns=derived_anion_gap derived_anion_gap_with_k
) }},

final as (
    select
        cast(derived_carried.person_id as bigint) as person_id,
        derived_carried.state_datetime,
        cast(derived_carried.visit_occurrence_id as bigint) as visit_occurrence_id,
        coalesce(person_diabetes.first_diabetes_datetime <= derived_carried.state_datetime, false) as known_diabetes,
        case when derived_carried.glucose_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.glucose_last end as dx_glucose,
        case when derived_carried.glucose_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.glucose_last end as rs_glucose,
        case when derived_carried.glucose_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.glucose_last_datetime end as rs_glucose_datetime,
        case when derived_carried.ph_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.ph_last end as dx_ph,
        case when derived_carried.ph_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.ph_last end as rs_ph,
        case when derived_carried.ph_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.ph_last_datetime end as rs_ph_datetime,
        case when derived_carried.bicarbonate_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.bicarbonate_last end as dx_bicarbonate,
        case when derived_carried.bicarbonate_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.bicarbonate_last end as rs_bicarbonate,
        case when derived_carried.bicarbonate_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.bicarbonate_last_datetime end as rs_bicarbonate_datetime,
        case when derived_carried.bhb_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.bhb_last end as dx_bhb,
        case when derived_carried.bhb_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.bhb_last end as rs_bhb,
        case when derived_carried.bhb_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.bhb_last_datetime end as rs_bhb_datetime,
        case when derived_carried.urine_ketones_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.urine_ketones_last end as dx_urine_ketones,
        case when derived_carried.urine_ketones_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.urine_ketones_last end as rs_urine_ketones,
        case when derived_carried.urine_ketones_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.urine_ketones_last_datetime end as rs_urine_ketones_datetime,
        case when derived_carried.sodium_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.sodium_last end as dx_sodium,
        case when derived_carried.sodium_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.sodium_last end as rs_sodium,
        case when derived_carried.sodium_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.sodium_last_datetime end as rs_sodium_datetime,
        case when derived_carried.chloride_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.chloride_last end as dx_chloride,
        case when derived_carried.chloride_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.chloride_last end as rs_chloride,
        case when derived_carried.chloride_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.chloride_last_datetime end as rs_chloride_datetime,
        case when derived_carried.potassium_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.potassium_last end as dx_potassium,
        case when derived_carried.potassium_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.potassium_last end as rs_potassium,
        case when derived_carried.potassium_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.potassium_last_datetime end as rs_potassium_datetime,
        case
            when derived_carried.anion_gap_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.anion_gap_last
            when derived_carried.derived_anion_gap_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.derived_anion_gap_last
        end as dx_anion_gap,
        case
            when derived_carried.anion_gap_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.anion_gap_last
            when derived_carried.derived_anion_gap_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.derived_anion_gap_last
        end as rs_anion_gap,
        case
            when derived_carried.anion_gap_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.anion_gap_last_datetime
            when derived_carried.derived_anion_gap_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.derived_anion_gap_last_datetime
        end as rs_anion_gap_datetime,
        case
            when derived_carried.anion_gap_with_k_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.anion_gap_with_k_last
            when derived_carried.derived_anion_gap_with_k_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.derived_anion_gap_with_k_last
        end as dx_anion_gap_with_k,
        case
            when derived_carried.anion_gap_with_k_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.anion_gap_with_k_last
            when derived_carried.derived_anion_gap_with_k_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.derived_anion_gap_with_k_last
        end as rs_anion_gap_with_k,
        case
            when derived_carried.anion_gap_with_k_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.anion_gap_with_k_last_datetime
            when derived_carried.derived_anion_gap_with_k_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.derived_anion_gap_with_k_last_datetime
        end as rs_anion_gap_with_k_datetime,
        case when derived_carried.hba1c_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.hba1c_last end as dx_hba1c,
        case when derived_carried.hba1c_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.hba1c_last end as rs_hba1c,
        case when derived_carried.hba1c_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.hba1c_last_datetime end as rs_hba1c_datetime,
        case when derived_carried.creatinine_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.creatinine_last end as dx_creatinine,
        case when derived_carried.creatinine_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.creatinine_last end as rs_creatinine,
        case when derived_carried.creatinine_last_datetime >= derived_carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.creatinine_last_datetime end as rs_creatinine_datetime
    from derived_carried
    left join person_diabetes
        on person_diabetes.person_id = derived_carried.person_id
)

select
    final.person_id,
    final.state_datetime,
    final.visit_occurrence_id,
    final.known_diabetes,
    final.dx_glucose,
    final.rs_glucose,
    final.rs_glucose_datetime,
    final.dx_ph,
    final.rs_ph,
    final.rs_ph_datetime,
    final.dx_bicarbonate,
    final.rs_bicarbonate,
    final.rs_bicarbonate_datetime,
    final.dx_bhb,
    final.rs_bhb,
    final.rs_bhb_datetime,
    final.dx_urine_ketones,
    final.rs_urine_ketones,
    final.rs_urine_ketones_datetime,
    final.dx_sodium,
    final.rs_sodium,
    final.rs_sodium_datetime,
    final.dx_chloride,
    final.rs_chloride,
    final.rs_chloride_datetime,
    final.dx_potassium,
    final.rs_potassium,
    final.rs_potassium_datetime,
    final.dx_anion_gap,
    final.rs_anion_gap,
    final.rs_anion_gap_datetime,
    final.dx_anion_gap_with_k,
    final.rs_anion_gap_with_k,
    final.rs_anion_gap_with_k_datetime,
    final.dx_hba1c,
    final.rs_hba1c,
    final.rs_hba1c_datetime,
    final.dx_creatinine,
    final.rs_creatinine,
    final.rs_creatinine_datetime
from final
