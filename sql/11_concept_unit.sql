-- 11_concept_unit: unit concepts accepted for each analyte, with the factor to the canonical unit.
-- grain:  one row per (analyte, unit_concept_id); unit_concept_id is null for the "none" rule
--         (a result recorded with no unit, accepted only where units.csv says so)
-- inputs: dka_codelist_unit (units.csv), concept (CDM vocabulary, UCUM codes)
-- output: dka_concept_unit (analyte, unit_concept_id, multiply, add, low, high)
-- canonical value = value_as_number * multiply + add; low/high bound the canonical value.
with

codelist as (
    select
        analyte,
        vocabulary_id,
        concept_code,
        multiply,
        add,
        low,
        high
    from dka_codelist_unit
),

ucum as (
    select
        concept_id,
        concept_code
    from concept
    where vocabulary_id = 'UCUM'
),

coded as (
    select distinct
        codelist.analyte,
        ucum.concept_id as unit_concept_id,
        codelist.multiply,
        codelist.add,
        codelist.low,
        codelist.high
    from codelist
    inner join ucum
        on ucum.concept_code = codelist.concept_code
    where codelist.vocabulary_id = 'UCUM'
),

unitless as (
    select
        analyte,
        cast(null as integer) as unit_concept_id,
        multiply,
        add,
        low,
        high
    from codelist
    where vocabulary_id = 'none'
),

final as (
    select analyte, unit_concept_id, multiply, add, low, high from coded
    union all
    select analyte, unit_concept_id, multiply, add, low, high from unitless
)

select
    analyte,
    unit_concept_id,
    multiply,
    add,
    low,
    high
from final
