-- 14_concept_route: route concepts (intravenous, subcutaneous).
-- grain:  one row per route concept_id
-- inputs: dka_codelist_route (routes.csv), concept (CDM vocabulary)
-- output: dka_concept_route (concept_id, route)
with

codelist as (
    select
        vocabulary_id,
        concept_code,
        route
    from dka_codelist_route
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
        codelist.route
    from codelist
    inner join vocabulary
        on vocabulary.vocabulary_id = codelist.vocabulary_id
        and vocabulary.concept_code = codelist.concept_code
),

final as (
    select
        concept_id,
        route
    from resolved
)

select
    concept_id,
    route
from final
