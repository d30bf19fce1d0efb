-- 15_concept_visit: visit concepts by kind (inpatient, emergency, emergency_inpatient,
-- outpatient, icu).
-- grain:  one row per visit concept_id
-- inputs: dka_codelist_visit (visits.csv), concept (CDM vocabulary)
-- output: dka_concept_visit (concept_id, visit_kind)
with

codelist as (
    select
        vocabulary_id,
        concept_code,
        visit_kind
    from dka_codelist_visit
),

vocabulary as (
    select
        concept_id,
        vocabulary_id,
        concept_code
    from concept
),

resolved as (
    select distinct
        vocabulary.concept_id,
        codelist.visit_kind
    from codelist
    inner join vocabulary
        on vocabulary.vocabulary_id = codelist.vocabulary_id
        and vocabulary.concept_code = codelist.concept_code
),

final as (
    select
        concept_id,
        visit_kind
    from resolved
)

select
    concept_id,
    visit_kind
from final
