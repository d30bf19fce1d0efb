-- 31_lab_state: the latest value of every analyte at every lab time point of a person.
-- grain:  one row per (person_id, state_datetime), a time point at which the person has at least
--         one usable result of a state analyte
-- inputs: dka_lab_events (sql/21), dka_person_diabetes (sql/30)
-- output: dka_lab_state (person_id, state_datetime, visit_occurrence_id, known_diabetes, and per
--         analyte dx_<analyte>, rs_<analyte>, rs_<analyte>_datetime)
-- slots:  diagnosis_lookback_hours, resolution_lookback_hours (float hours),
--         anion_gap_pairing_minutes (float minutes), ph_specimens, bicarbonate_specimens (word
--         lists), person_screen (a compiled boolean over the per-person extremes below; `true`
--         keeps everyone), state_analytes (word list: the analytes carried, from
--         cohort.episodes.carried_analytes; the columns of any other analyte stay null)
--
-- Rules (toolkit choices, common practice unless a source is named):
-- * pH and bicarbonate count only from the accepted specimens; other analytes from any specimen.
-- * Several results of one analyte at one time point: the most acidotic pH and bicarbonate (min),
--   the highest glucose, ketones, anion gap, HbA1c and creatinine (max), the mean of sodium,
--   chloride and potassium.
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
-- * Portable form (count, then the first value of each count group, then a time-bound check): a
--   running count of non-null values per analyte, over one window shared by every analyte (the
--   default frame: state_datetime is unique within a person, so RANGE and ROWS agree), splits
--   a person's rows into groups that each start at a non-null value. The group's first (and only
--   non-null) value is exactly first_value over (partition by person_id, <analyte>_count order by
--   state_datetime); it is read here by an equi-join of each row to the non-null rows on
--   (person_id, <analyte>_count), which gives the same value without one sort per analyte
--   (tests/test_lab_state.py checks the result against a plain-Python reference). The look-back
--   is then checked on the value's time. No ASOF join, IGNORE NULLS or LATERAL.
-- * state_analytes: an analyte not in the list is still a time point (the rows do not depend on
--   the list) but gets no running count, no join and null columns. The test `'x' in (...)` is
--   a constant, so each engine's planner drops the unused window aggregate and join.
-- * person_screen drops persons who can never meet a diagnosis (a monotone relaxation of the
--   diagnostic criteria over each person's extremes, built by cohort.episodes); it changes no row
--   of a person kept.

with
lab_events as (
    select
        dka_lab_events.person_id,
        dka_lab_events.visit_occurrence_id,
        dka_lab_events.event_datetime,
        dka_lab_events.analyte,
        dka_lab_events.value
    from dka_lab_events
    where
        dka_lab_events.event_datetime is not null
        and dka_lab_events.value is not null
        and dka_lab_events.analyte in ('glucose', 'ph', 'bicarbonate', 'bhb', 'urine_ketones', 'sodium', 'chloride', 'potassium', 'anion_gap', 'anion_gap_with_k', 'hba1c', 'creatinine')
        and (
            dka_lab_events.analyte not in ('ph', 'bicarbonate')
            or (dka_lab_events.analyte = 'ph' and dka_lab_events.specimen in {{ ph_specimens }})
            or (dka_lab_events.analyte = 'bicarbonate' and dka_lab_events.specimen in {{ bicarbonate_specimens }})
        )
),

person_diabetes as (
    select
        dka_person_diabetes.person_id,
        dka_person_diabetes.first_diabetes_datetime
    from dka_person_diabetes
),

person_extremes as (
    select
        lab_events.person_id,
        min(case when lab_events.analyte = 'glucose' then lab_events.value end) as min_glucose,
        max(case when lab_events.analyte = 'glucose' then lab_events.value end) as max_glucose,
        min(case when lab_events.analyte = 'ph' then lab_events.value end) as min_ph,
        max(case when lab_events.analyte = 'ph' then lab_events.value end) as max_ph,
        min(case when lab_events.analyte = 'bicarbonate' then lab_events.value end) as min_bicarbonate,
        max(case when lab_events.analyte = 'bicarbonate' then lab_events.value end) as max_bicarbonate,
        min(case when lab_events.analyte = 'bhb' then lab_events.value end) as min_bhb,
        max(case when lab_events.analyte = 'bhb' then lab_events.value end) as max_bhb,
        min(case when lab_events.analyte = 'urine_ketones' then lab_events.value end) as min_urine_ketones,
        max(case when lab_events.analyte = 'urine_ketones' then lab_events.value end) as max_urine_ketones,
        min(case when lab_events.analyte = 'sodium' then lab_events.value end) as min_sodium,
        max(case when lab_events.analyte = 'sodium' then lab_events.value end) as max_sodium,
        min(case when lab_events.analyte = 'chloride' then lab_events.value end) as min_chloride,
        max(case when lab_events.analyte = 'chloride' then lab_events.value end) as max_chloride,
        min(case when lab_events.analyte = 'potassium' then lab_events.value end) as min_potassium,
        max(case when lab_events.analyte = 'potassium' then lab_events.value end) as max_potassium,
        min(case when lab_events.analyte = 'anion_gap' then lab_events.value end) as min_anion_gap,
        max(case when lab_events.analyte = 'anion_gap' then lab_events.value end) as max_anion_gap,
        min(case when lab_events.analyte = 'anion_gap_with_k' then lab_events.value end) as min_anion_gap_with_k,
        max(case when lab_events.analyte = 'anion_gap_with_k' then lab_events.value end) as max_anion_gap_with_k,
        min(case when lab_events.analyte = 'hba1c' then lab_events.value end) as min_hba1c,
        max(case when lab_events.analyte = 'hba1c' then lab_events.value end) as max_hba1c,
        min(case when lab_events.analyte = 'creatinine' then lab_events.value end) as min_creatinine,
        max(case when lab_events.analyte = 'creatinine' then lab_events.value end) as max_creatinine
    from lab_events
    group by lab_events.person_id
),

screened_persons as (
    select
        person_extremes.person_id
    from person_extremes
    left join person_diabetes
        on person_diabetes.person_id = person_extremes.person_id
    where {{ person_screen }}
),

time_points as (
    select
        lab_events.person_id,
        lab_events.event_datetime as state_datetime,
        max(lab_events.visit_occurrence_id) as visit_occurrence_id,
        case when 'glucose' in {{ state_analytes }} then max(case when lab_events.analyte = 'glucose' then lab_events.value end) end as glucose,
        case when 'ph' in {{ state_analytes }} then min(case when lab_events.analyte = 'ph' then lab_events.value end) end as ph,
        case when 'bicarbonate' in {{ state_analytes }} then min(case when lab_events.analyte = 'bicarbonate' then lab_events.value end) end as bicarbonate,
        case when 'bhb' in {{ state_analytes }} then max(case when lab_events.analyte = 'bhb' then lab_events.value end) end as bhb,
        case when 'urine_ketones' in {{ state_analytes }} then max(case when lab_events.analyte = 'urine_ketones' then lab_events.value end) end as urine_ketones,
        case when 'sodium' in {{ state_analytes }} then avg(case when lab_events.analyte = 'sodium' then lab_events.value end) end as sodium,
        case when 'chloride' in {{ state_analytes }} then avg(case when lab_events.analyte = 'chloride' then lab_events.value end) end as chloride,
        case when 'potassium' in {{ state_analytes }} then avg(case when lab_events.analyte = 'potassium' then lab_events.value end) end as potassium,
        case when 'anion_gap' in {{ state_analytes }} then max(case when lab_events.analyte = 'anion_gap' then lab_events.value end) end as anion_gap,
        case when 'anion_gap_with_k' in {{ state_analytes }} then max(case when lab_events.analyte = 'anion_gap_with_k' then lab_events.value end) end as anion_gap_with_k,
        case when 'hba1c' in {{ state_analytes }} then max(case when lab_events.analyte = 'hba1c' then lab_events.value end) end as hba1c,
        case when 'creatinine' in {{ state_analytes }} then max(case when lab_events.analyte = 'creatinine' then lab_events.value end) end as creatinine
    from lab_events
    inner join screened_persons
        on screened_persons.person_id = lab_events.person_id
    group by lab_events.person_id, lab_events.event_datetime
),

counted as (
    select
        time_points.person_id,
        time_points.state_datetime,
        time_points.visit_occurrence_id,
        time_points.glucose,
        time_points.ph,
        time_points.bicarbonate,
        time_points.bhb,
        time_points.urine_ketones,
        time_points.sodium,
        time_points.chloride,
        time_points.potassium,
        time_points.anion_gap,
        time_points.anion_gap_with_k,
        time_points.hba1c,
        time_points.creatinine,
        case when 'glucose' in {{ state_analytes }} then count(time_points.glucose) over person_time end as glucose_count,
        case when 'ph' in {{ state_analytes }} then count(time_points.ph) over person_time end as ph_count,
        case when 'bicarbonate' in {{ state_analytes }} then count(time_points.bicarbonate) over person_time end as bicarbonate_count,
        case when 'bhb' in {{ state_analytes }} then count(time_points.bhb) over person_time end as bhb_count,
        case when 'urine_ketones' in {{ state_analytes }} then count(time_points.urine_ketones) over person_time end as urine_ketones_count,
        case when 'sodium' in {{ state_analytes }} then count(time_points.sodium) over person_time end as sodium_count,
        case when 'chloride' in {{ state_analytes }} then count(time_points.chloride) over person_time end as chloride_count,
        case when 'potassium' in {{ state_analytes }} then count(time_points.potassium) over person_time end as potassium_count,
        case when 'anion_gap' in {{ state_analytes }} then count(time_points.anion_gap) over person_time end as anion_gap_count,
        case when 'anion_gap_with_k' in {{ state_analytes }} then count(time_points.anion_gap_with_k) over person_time end as anion_gap_with_k_count,
        case when 'hba1c' in {{ state_analytes }} then count(time_points.hba1c) over person_time end as hba1c_count,
        case when 'creatinine' in {{ state_analytes }} then count(time_points.creatinine) over person_time end as creatinine_count
    from time_points
    window person_time as (partition by time_points.person_id order by time_points.state_datetime)
),

glucose_values as (
    select
        counted.person_id,
        counted.glucose_count,
        counted.glucose as glucose_value,
        counted.state_datetime as glucose_value_datetime
    from counted
    where counted.glucose is not null and 'glucose' in {{ state_analytes }}
),

ph_values as (
    select
        counted.person_id,
        counted.ph_count,
        counted.ph as ph_value,
        counted.state_datetime as ph_value_datetime
    from counted
    where counted.ph is not null and 'ph' in {{ state_analytes }}
),

bicarbonate_values as (
    select
        counted.person_id,
        counted.bicarbonate_count,
        counted.bicarbonate as bicarbonate_value,
        counted.state_datetime as bicarbonate_value_datetime
    from counted
    where counted.bicarbonate is not null and 'bicarbonate' in {{ state_analytes }}
),

bhb_values as (
    select
        counted.person_id,
        counted.bhb_count,
        counted.bhb as bhb_value,
        counted.state_datetime as bhb_value_datetime
    from counted
    where counted.bhb is not null and 'bhb' in {{ state_analytes }}
),

urine_ketones_values as (
    select
        counted.person_id,
        counted.urine_ketones_count,
        counted.urine_ketones as urine_ketones_value,
        counted.state_datetime as urine_ketones_value_datetime
    from counted
    where counted.urine_ketones is not null and 'urine_ketones' in {{ state_analytes }}
),

sodium_values as (
    select
        counted.person_id,
        counted.sodium_count,
        counted.sodium as sodium_value,
        counted.state_datetime as sodium_value_datetime
    from counted
    where counted.sodium is not null and 'sodium' in {{ state_analytes }}
),

chloride_values as (
    select
        counted.person_id,
        counted.chloride_count,
        counted.chloride as chloride_value,
        counted.state_datetime as chloride_value_datetime
    from counted
    where counted.chloride is not null and 'chloride' in {{ state_analytes }}
),

potassium_values as (
    select
        counted.person_id,
        counted.potassium_count,
        counted.potassium as potassium_value,
        counted.state_datetime as potassium_value_datetime
    from counted
    where counted.potassium is not null and 'potassium' in {{ state_analytes }}
),

anion_gap_values as (
    select
        counted.person_id,
        counted.anion_gap_count,
        counted.anion_gap as anion_gap_value,
        counted.state_datetime as anion_gap_value_datetime
    from counted
    where counted.anion_gap is not null and 'anion_gap' in {{ state_analytes }}
),

anion_gap_with_k_values as (
    select
        counted.person_id,
        counted.anion_gap_with_k_count,
        counted.anion_gap_with_k as anion_gap_with_k_value,
        counted.state_datetime as anion_gap_with_k_value_datetime
    from counted
    where counted.anion_gap_with_k is not null and 'anion_gap_with_k' in {{ state_analytes }}
),

hba1c_values as (
    select
        counted.person_id,
        counted.hba1c_count,
        counted.hba1c as hba1c_value,
        counted.state_datetime as hba1c_value_datetime
    from counted
    where counted.hba1c is not null and 'hba1c' in {{ state_analytes }}
),

creatinine_values as (
    select
        counted.person_id,
        counted.creatinine_count,
        counted.creatinine as creatinine_value,
        counted.state_datetime as creatinine_value_datetime
    from counted
    where counted.creatinine is not null and 'creatinine' in {{ state_analytes }}
),

carried as (
    select
        counted.person_id,
        counted.state_datetime,
        counted.visit_occurrence_id,
        glucose_values.glucose_value as glucose_last,
        glucose_values.glucose_value_datetime as glucose_last_datetime,
        ph_values.ph_value as ph_last,
        ph_values.ph_value_datetime as ph_last_datetime,
        bicarbonate_values.bicarbonate_value as bicarbonate_last,
        bicarbonate_values.bicarbonate_value_datetime as bicarbonate_last_datetime,
        bhb_values.bhb_value as bhb_last,
        bhb_values.bhb_value_datetime as bhb_last_datetime,
        urine_ketones_values.urine_ketones_value as urine_ketones_last,
        urine_ketones_values.urine_ketones_value_datetime as urine_ketones_last_datetime,
        sodium_values.sodium_value as sodium_last,
        sodium_values.sodium_value_datetime as sodium_last_datetime,
        chloride_values.chloride_value as chloride_last,
        chloride_values.chloride_value_datetime as chloride_last_datetime,
        potassium_values.potassium_value as potassium_last,
        potassium_values.potassium_value_datetime as potassium_last_datetime,
        anion_gap_values.anion_gap_value as anion_gap_last,
        anion_gap_values.anion_gap_value_datetime as anion_gap_last_datetime,
        anion_gap_with_k_values.anion_gap_with_k_value as anion_gap_with_k_last,
        anion_gap_with_k_values.anion_gap_with_k_value_datetime as anion_gap_with_k_last_datetime,
        hba1c_values.hba1c_value as hba1c_last,
        hba1c_values.hba1c_value_datetime as hba1c_last_datetime,
        creatinine_values.creatinine_value as creatinine_last,
        creatinine_values.creatinine_value_datetime as creatinine_last_datetime
    from counted
    left join glucose_values
        on glucose_values.person_id = counted.person_id
        and glucose_values.glucose_count = counted.glucose_count
    left join ph_values
        on ph_values.person_id = counted.person_id
        and ph_values.ph_count = counted.ph_count
    left join bicarbonate_values
        on bicarbonate_values.person_id = counted.person_id
        and bicarbonate_values.bicarbonate_count = counted.bicarbonate_count
    left join bhb_values
        on bhb_values.person_id = counted.person_id
        and bhb_values.bhb_count = counted.bhb_count
    left join urine_ketones_values
        on urine_ketones_values.person_id = counted.person_id
        and urine_ketones_values.urine_ketones_count = counted.urine_ketones_count
    left join sodium_values
        on sodium_values.person_id = counted.person_id
        and sodium_values.sodium_count = counted.sodium_count
    left join chloride_values
        on chloride_values.person_id = counted.person_id
        and chloride_values.chloride_count = counted.chloride_count
    left join potassium_values
        on potassium_values.person_id = counted.person_id
        and potassium_values.potassium_count = counted.potassium_count
    left join anion_gap_values
        on anion_gap_values.person_id = counted.person_id
        and anion_gap_values.anion_gap_count = counted.anion_gap_count
    left join anion_gap_with_k_values
        on anion_gap_with_k_values.person_id = counted.person_id
        and anion_gap_with_k_values.anion_gap_with_k_count = counted.anion_gap_with_k_count
    left join hba1c_values
        on hba1c_values.person_id = counted.person_id
        and hba1c_values.hba1c_count = counted.hba1c_count
    left join creatinine_values
        on creatinine_values.person_id = counted.person_id
        and creatinine_values.creatinine_count = counted.creatinine_count
),

derived as (
    select
        carried.person_id,
        carried.state_datetime,
        case
            when 'anion_gap' in {{ state_analytes }}
                and carried.sodium_last is not null
                and carried.chloride_last is not null
                and carried.bicarbonate_last is not null
                and greatest(carried.sodium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) <= least(carried.sodium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) + interval '1 minute' * {{ anion_gap_pairing_minutes }}
                and greatest(carried.sodium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) = carried.state_datetime
                then carried.sodium_last - (carried.chloride_last + carried.bicarbonate_last)
        end as anion_gap_derived,
        case
            when 'anion_gap_with_k' in {{ state_analytes }}
                and carried.sodium_last is not null
                and carried.potassium_last is not null
                and carried.chloride_last is not null
                and carried.bicarbonate_last is not null
                and greatest(carried.sodium_last_datetime, carried.potassium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) <= least(carried.sodium_last_datetime, carried.potassium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) + interval '1 minute' * {{ anion_gap_pairing_minutes }}
                and greatest(carried.sodium_last_datetime, carried.potassium_last_datetime, carried.chloride_last_datetime, carried.bicarbonate_last_datetime) = carried.state_datetime
                then (carried.sodium_last + carried.potassium_last) - (carried.chloride_last + carried.bicarbonate_last)
        end as anion_gap_with_k_derived
    from carried
),

derived_counted as (
    select
        derived.person_id,
        derived.state_datetime,
        derived.anion_gap_derived,
        derived.anion_gap_with_k_derived,
        case when 'anion_gap' in {{ state_analytes }} then count(derived.anion_gap_derived) over person_time end as anion_gap_derived_count,
        case when 'anion_gap_with_k' in {{ state_analytes }} then count(derived.anion_gap_with_k_derived) over person_time end as anion_gap_with_k_derived_count
    from derived
    window person_time as (partition by derived.person_id order by derived.state_datetime)
),

anion_gap_derived_values as (
    select
        derived_counted.person_id,
        derived_counted.anion_gap_derived_count,
        derived_counted.anion_gap_derived as anion_gap_derived_value,
        derived_counted.state_datetime as anion_gap_derived_value_datetime
    from derived_counted
    where derived_counted.anion_gap_derived is not null and 'anion_gap' in {{ state_analytes }}
),

anion_gap_with_k_derived_values as (
    select
        derived_counted.person_id,
        derived_counted.anion_gap_with_k_derived_count,
        derived_counted.anion_gap_with_k_derived as anion_gap_with_k_derived_value,
        derived_counted.state_datetime as anion_gap_with_k_derived_value_datetime
    from derived_counted
    where derived_counted.anion_gap_with_k_derived is not null and 'anion_gap_with_k' in {{ state_analytes }}
),

derived_carried as (
    select
        derived_counted.person_id,
        derived_counted.state_datetime,
        anion_gap_derived_values.anion_gap_derived_value as anion_gap_derived_last,
        anion_gap_derived_values.anion_gap_derived_value_datetime as anion_gap_derived_last_datetime,
        anion_gap_with_k_derived_values.anion_gap_with_k_derived_value as anion_gap_with_k_derived_last,
        anion_gap_with_k_derived_values.anion_gap_with_k_derived_value_datetime as anion_gap_with_k_derived_last_datetime
    from derived_counted
    left join anion_gap_derived_values
        on anion_gap_derived_values.person_id = derived_counted.person_id
        and anion_gap_derived_values.anion_gap_derived_count = derived_counted.anion_gap_derived_count
    left join anion_gap_with_k_derived_values
        on anion_gap_with_k_derived_values.person_id = derived_counted.person_id
        and anion_gap_with_k_derived_values.anion_gap_with_k_derived_count = derived_counted.anion_gap_with_k_derived_count
),

final as (
    select
        cast(carried.person_id as bigint) as person_id,
        carried.state_datetime,
        cast(carried.visit_occurrence_id as bigint) as visit_occurrence_id,
        coalesce(person_diabetes.first_diabetes_datetime <= carried.state_datetime, false) as known_diabetes,
        case when carried.glucose_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.glucose_last end as dx_glucose,
        case when carried.glucose_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.glucose_last end as rs_glucose,
        case when carried.glucose_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.glucose_last_datetime end as rs_glucose_datetime,
        case when carried.ph_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.ph_last end as dx_ph,
        case when carried.ph_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.ph_last end as rs_ph,
        case when carried.ph_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.ph_last_datetime end as rs_ph_datetime,
        case when carried.bicarbonate_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.bicarbonate_last end as dx_bicarbonate,
        case when carried.bicarbonate_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.bicarbonate_last end as rs_bicarbonate,
        case when carried.bicarbonate_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.bicarbonate_last_datetime end as rs_bicarbonate_datetime,
        case when carried.bhb_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.bhb_last end as dx_bhb,
        case when carried.bhb_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.bhb_last end as rs_bhb,
        case when carried.bhb_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.bhb_last_datetime end as rs_bhb_datetime,
        case when carried.urine_ketones_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.urine_ketones_last end as dx_urine_ketones,
        case when carried.urine_ketones_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.urine_ketones_last end as rs_urine_ketones,
        case when carried.urine_ketones_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.urine_ketones_last_datetime end as rs_urine_ketones_datetime,
        case when carried.sodium_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.sodium_last end as dx_sodium,
        case when carried.sodium_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.sodium_last end as rs_sodium,
        case when carried.sodium_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.sodium_last_datetime end as rs_sodium_datetime,
        case when carried.chloride_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.chloride_last end as dx_chloride,
        case when carried.chloride_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.chloride_last end as rs_chloride,
        case when carried.chloride_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.chloride_last_datetime end as rs_chloride_datetime,
        case when carried.potassium_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.potassium_last end as dx_potassium,
        case when carried.potassium_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.potassium_last end as rs_potassium,
        case when carried.potassium_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.potassium_last_datetime end as rs_potassium_datetime,
        case
            when carried.anion_gap_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.anion_gap_last
            when derived_carried.anion_gap_derived_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.anion_gap_derived_last
        end as dx_anion_gap,
        case
            when carried.anion_gap_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.anion_gap_last
            when derived_carried.anion_gap_derived_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.anion_gap_derived_last
        end as rs_anion_gap,
        case
            when carried.anion_gap_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.anion_gap_last_datetime
            when derived_carried.anion_gap_derived_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.anion_gap_derived_last_datetime
        end as rs_anion_gap_datetime,
        case
            when carried.anion_gap_with_k_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.anion_gap_with_k_last
            when derived_carried.anion_gap_with_k_derived_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then derived_carried.anion_gap_with_k_derived_last
        end as dx_anion_gap_with_k,
        case
            when carried.anion_gap_with_k_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.anion_gap_with_k_last
            when derived_carried.anion_gap_with_k_derived_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.anion_gap_with_k_derived_last
        end as rs_anion_gap_with_k,
        case
            when carried.anion_gap_with_k_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.anion_gap_with_k_last_datetime
            when derived_carried.anion_gap_with_k_derived_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then derived_carried.anion_gap_with_k_derived_last_datetime
        end as rs_anion_gap_with_k_datetime,
        case when carried.hba1c_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.hba1c_last end as dx_hba1c,
        case when carried.hba1c_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.hba1c_last end as rs_hba1c,
        case when carried.hba1c_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.hba1c_last_datetime end as rs_hba1c_datetime,
        case when carried.creatinine_last_datetime >= carried.state_datetime - interval '1 hour' * {{ diagnosis_lookback_hours }} then carried.creatinine_last end as dx_creatinine,
        case when carried.creatinine_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.creatinine_last end as rs_creatinine,
        case when carried.creatinine_last_datetime >= carried.state_datetime - interval '1 hour' * {{ resolution_lookback_hours }} then carried.creatinine_last_datetime end as rs_creatinine_datetime
    from carried
    left join derived_carried
        on derived_carried.person_id = carried.person_id
        and derived_carried.state_datetime = carried.state_datetime
    left join person_diabetes
        on person_diabetes.person_id = carried.person_id
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
