-- 20_measurement_checked: every measurement row of a DKA analyte, in canonical units, with the
-- reason it cannot be used (null when it can).
-- grain:  one row per measurement row whose measurement_concept_id is in dka_concept_lab
-- inputs: measurement, person, death, observation_period (CDM views); dka_concept_lab,
--         dka_concept_unit, dka_concept_ketone, dka_codelist_ketone
-- output: dka_measurement_checked (measurement_id, person_id, measurement_concept_id,
--         visit_occurrence_id, event_datetime, analyte, specimen, value, reason, detail,
--         unit_concept_id, value_as_number, value_as_concept_id, value_text_key)
--
-- Value: value_as_number * multiply + add from the (analyte, unit_concept_id) rule of units.csv;
-- unit_concept_id 0 or null is "no unit", accepted only where units.csv has a `none` line for the
-- analyte. Units are never guessed (no unit_source_value text, no code property).
-- Urine ketones: the ordinal 0..4 from value_as_concept_id (ketone_ordinals.csv SNOMED codes),
-- else from value_source_value text (case- and space-insensitive), else value_as_number (a whole
-- number 0..4 with no unit); a coded or text answer wins over value_as_number.
--
-- One reason per row, the first that applies in this order:
--   1 person_unknown       person_id not in person
--   2 no_time              measurement_datetime null (a date-only result cannot be placed in hours)
--   3 before_birth         before birth_datetime; without it, before the first moment of
--                          month_of_birth (or of year_of_birth), the earliest the birth can be
--   4 after_death          on a day after the death date (results until the end of the death
--                          day are kept: the death record's time is often missing or rounded)
--   5 outside_observation  the day is covered by no observation period
--   6 implausible_time     before 1900-01-01, or on or after the slot results_before: the day after
--                          the run's as-of date (a result from the future is a clock or placeholder
--                          error; the as-of date is in the manifest so that a rerun uses it)
--   7 no_value             no value_as_number and no ordinal answer
--   8 unit_unknown         the unit is not listed for the analyte in units.csv
--   9 implausible          canonical value outside units.csv low..high (or a urine ketone number
--                          that is not a whole ordinal)
--  10 duplicate            same person, concept, datetime, unit and value as a row with a lower
--                          measurement_id (that row is kept): the last reason, given to rows
--                          usable here by sql/24 from the copies sql/22 finds; sql/23 leaves them
--                          out of the lab events
--
-- slot:   row_scope, a toolkit-made condition on `measurement` limiting the rows checked (`true`
--         for every row; cohort/_labs.py narrows it for the quarantine reading, see below)
--
-- The last four columns are the source row's own repeat key (unit_concept_id with 0 as null, the
-- value as given, and with no number the value_source_value text without case or spaces), which
-- sql/22 compares.
--
-- In DuckDB this recipe is a view, read once by sql/21 (every row, gathered by time point) and
-- once for sql/22 and sql/24 together (row_scope set to the rows at time points holding an
-- excluded row or a repeated concept, and the rows with no person or time; those rows are kept
-- for both recipes, cohort/_labs.py): each reading is a
-- scan with hash joins to small tables, cheaper than writing tens of millions of rows. So the
-- joins are kept few: the person's facts and a single observation period come from one table of
-- a million rows; the few persons whose merged periods are more than one are looked up in a
-- second, small table; units are matched by (concept_id, unit) integers.
with

lab_concepts as (
    select
        concept_id,
        analyte,
        specimen
    from dka_concept_lab
),

unit_rules as (
    select
        analyte,
        coalesce(unit_concept_id, -1) as unit_key,
        multiply,
        add,
        low,
        high
    from dka_concept_unit
),

-- the unit rules of each lab concept, so a row's unit is matched on two integers
concept_units as (
    select
        lab_concepts.concept_id,
        unit_rules.unit_key,
        unit_rules.analyte,
        unit_rules.multiply,
        unit_rules.add,
        unit_rules.low,
        unit_rules.high
    from lab_concepts
    inner join unit_rules
        on unit_rules.analyte = lab_concepts.analyte
),

ketone_concepts as (
    select
        concept_id,
        ordinal
    from dka_concept_ketone
),

ketone_texts as (
    select
        lower(replace(text, ' ', '')) as text_key,
        min(ordinal) as ordinal
    from dka_codelist_ketone
    group by lower(replace(text, ' ', ''))
),

persons as (
    select
        person_id,
        min(
            coalesce(
                birth_datetime,
                make_timestamp(
                    year_of_birth,
                    case when month_of_birth between 1 and 12 then month_of_birth else 1 end,
                    1, 0, 0, 0
                )
            )
        ) as birth_datetime
    from person
    group by person_id
),

deaths as (
    select
        person_id,
        min(coalesce(death_date, cast(death_datetime as date))) as death_date
    from death
    group by person_id
),

periods as (
    select
        person_id,
        observation_period_start_date as start_date,
        observation_period_end_date as end_date
    from observation_period
    where observation_period_start_date is not null
        and observation_period_end_date is not null
),

-- overlapping observation periods are merged (gaps and islands) so the join below finds at most
-- one period per row
periods_ordered as (
    select
        person_id,
        start_date,
        end_date,
        max(end_date) over (
            partition by person_id
            order by start_date, end_date
            rows between unbounded preceding and 1 preceding
        ) as previous_end
    from periods
),

periods_numbered as (
    select
        person_id,
        start_date,
        end_date,
        sum(case when previous_end is null or start_date > previous_end then 1 else 0 end) over (
            partition by person_id
            order by start_date, end_date
            rows between unbounded preceding and current row
        ) as island
    from periods_ordered
),

periods_merged as (
    select
        person_id,
        min(start_date) as start_date,
        max(end_date) as end_date
    from periods_numbered
    group by person_id, island
),

period_counts as (
    select
        person_id,
        count(*) as islands,
        min(start_date) as start_date,
        max(end_date) as end_date
    from periods_merged
    group by person_id
),

-- person facts joined once here (a million rows), not once per measurement row; a person with one
-- merged observation period (nearly everyone) carries it here
person_facts as (
    select
        persons.person_id,
        persons.birth_datetime,
        deaths.death_date,
        period_counts.islands,
        period_counts.start_date,
        period_counts.end_date
    from persons
    left join deaths
        on deaths.person_id = persons.person_id
    left join period_counts
        on period_counts.person_id = persons.person_id
),

-- the periods of persons with more than one, looked up by date
split_periods as (
    select
        periods_merged.person_id,
        periods_merged.start_date,
        periods_merged.end_date
    from periods_merged
    inner join period_counts
        on period_counts.person_id = periods_merged.person_id
    where period_counts.islands > 1
),

measurements as (
    select
        measurement.measurement_id,
        measurement.person_id,
        measurement.measurement_concept_id,
        measurement.measurement_date,
        measurement.measurement_datetime,
        measurement.visit_occurrence_id,
        measurement.value_as_number,
        measurement.value_as_concept_id,
        measurement.value_source_value,
        case when measurement.unit_concept_id = 0 then null else measurement.unit_concept_id end as unit_concept_id,
        measurement.unit_source_value,
        lab_concepts.analyte,
        lab_concepts.specimen,
        case
            when lab_concepts.analyte = 'urine_ketones' then measurement.value_as_concept_id
        end as ketone_concept_id,
        case
            when lab_concepts.analyte = 'urine_ketones'
                then lower(replace(trim(measurement.value_source_value), ' ', ''))
        end as ketone_text_key
    from measurement
    inner join lab_concepts
        on lab_concepts.concept_id = measurement.measurement_concept_id
    where {{ row_scope }}
),

joined as (
    select
        measurements.measurement_id,
        measurements.person_id,
        measurements.measurement_concept_id,
        measurements.measurement_date,
        measurements.measurement_datetime,
        measurements.visit_occurrence_id,
        measurements.value_as_number,
        measurements.value_as_concept_id,
        measurements.value_source_value,
        measurements.unit_concept_id,
        measurements.unit_source_value,
        measurements.analyte,
        measurements.specimen,
        person_facts.person_id as known_person_id,
        person_facts.birth_datetime,
        person_facts.death_date,
        case
            when person_facts.islands = 1
                and cast(measurements.measurement_datetime as date) >= person_facts.start_date
                and cast(measurements.measurement_datetime as date) <= person_facts.end_date
                then measurements.person_id
            else split_periods.person_id
        end as observed_person_id,
        concept_units.analyte as unit_rule_analyte,
        concept_units.multiply,
        concept_units.add,
        concept_units.low,
        concept_units.high,
        coalesce(ketone_concepts.ordinal, ketone_texts.ordinal) as ordinal
    from measurements
    left join person_facts
        on person_facts.person_id = measurements.person_id
    left join split_periods
        on split_periods.person_id = measurements.person_id
        and cast(measurements.measurement_datetime as date) >= split_periods.start_date
        and cast(measurements.measurement_datetime as date) <= split_periods.end_date
    left join concept_units
        on concept_units.concept_id = measurements.measurement_concept_id
        and concept_units.unit_key = coalesce(measurements.unit_concept_id, -1)
    left join ketone_concepts
        on ketone_concepts.concept_id = measurements.ketone_concept_id
    left join ketone_texts
        on ketone_texts.text_key = measurements.ketone_text_key
),

valued as (
    select
        measurement_id,
        person_id,
        measurement_concept_id,
        visit_occurrence_id,
        measurement_date,
        measurement_datetime,
        analyte,
        specimen,
        value_as_number,
        value_as_concept_id,
        value_source_value,
        unit_concept_id,
        unit_source_value,
        known_person_id,
        birth_datetime,
        death_date,
        observed_person_id,
        unit_rule_analyte,
        low,
        high,
        ordinal,
        case
            when ordinal is not null then cast(ordinal as double)
            when value_as_number is not null and unit_rule_analyte is not null
                then value_as_number * multiply + add
        end as value
    from joined
),

reasoned as (
    select
        measurement_id,
        person_id,
        measurement_concept_id,
        visit_occurrence_id,
        measurement_date,
        measurement_datetime,
        analyte,
        specimen,
        value_as_number,
        unit_concept_id,
        unit_source_value,
        birth_datetime,
        death_date,
        low,
        high,
        value,
        value_as_concept_id,
        value_source_value,
        case
            when known_person_id is null then 'person_unknown'
            when measurement_datetime is null then 'no_time'
            when measurement_datetime < birth_datetime then 'before_birth'
            when cast(measurement_datetime as date) > death_date then 'after_death'
            when observed_person_id is null then 'outside_observation'
            when measurement_datetime < timestamp '1900-01-01 00:00:00'
                or measurement_datetime >= {{ results_before }} then 'implausible_time'
            when ordinal is null and value_as_number is null then 'no_value'
            when ordinal is null and unit_rule_analyte is null then 'unit_unknown'
            when value < low or value > high then 'implausible'
            when analyte = 'urine_ketones' and value <> floor(value) then 'implausible'
        end as reason
    from valued
),

final as (
    select
        measurement_id,
        person_id,
        measurement_concept_id,
        visit_occurrence_id,
        measurement_datetime as event_datetime,
        analyte,
        specimen,
        value,
        reason,
        -- most rows are usable: test for that first, then name the reason
        case when reason is not null then case reason
            when 'person_unknown' then 'person_id ' || coalesce(cast(person_id as varchar), 'null') || ' is not in person'
            when 'no_time' then 'measurement_datetime is null (measurement_date '
                || coalesce(cast(measurement_date as varchar), 'null') || ')'
            when 'before_birth' then 'measured ' || cast(measurement_datetime as varchar)
                || ', before birth ' || cast(birth_datetime as varchar)
            when 'after_death' then 'measured ' || cast(measurement_datetime as varchar)
                || ', after the death date ' || cast(death_date as varchar)
            when 'outside_observation' then 'no observation period covers '
                || cast(cast(measurement_datetime as date) as varchar)
            when 'implausible_time' then 'measured ' || cast(measurement_datetime as varchar)
                || ', before 1900-01-01 or after the as-of date'
            when 'no_value' then 'no value_as_number and no ordinal answer'
            when 'unit_unknown' then 'unit_concept_id ' || coalesce(cast(unit_concept_id as varchar), '0')
                || ' (unit_source_value ' || coalesce('''' || unit_source_value || '''', 'null')
                || ') is not a unit of ' || analyte || ' in units.csv'
            when 'implausible' then
                case
                    when value >= low and value <= high
                        then 'urine ketone value ' || cast(value as varchar) || ' is not a whole ordinal 0 .. 4'
                    else 'value ' || cast(value as varchar) || ' (canonical unit) outside '
                        || cast(low as varchar) || ' .. ' || cast(high as varchar)
                end
        end end as detail,
        unit_concept_id,
        value_as_number,
        value_as_concept_id,
        case
            when value_as_number is null then lower(replace(trim(value_source_value), ' ', ''))
        end as value_text_key
    from reasoned
)

select
    measurement_id,
    person_id,
    measurement_concept_id,
    visit_occurrence_id,
    event_datetime,
    analyte,
    specimen,
    value,
    reason,
    detail,
    unit_concept_id,
    value_as_number,
    value_as_concept_id,
    value_text_key
from final
