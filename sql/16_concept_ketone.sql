-- 16_concept_ketone: coded urine-ketone answers (SNOMED CT qualifier values) and their ordinal.
-- grain:  one row per answer concept_id
-- inputs: dka_codelist_ketone (ketone_ordinals.csv, lines with a code), concept
-- output: dka_concept_ketone (concept_id, ordinal)
-- Text answers ("2+", "moderate") are matched in sql/20 from dka_codelist_ketone directly.
with

codelist as (
    select
        vocabulary_id,
        concept_code,
        ordinal
    from dka_codelist_ketone
    where concept_code is not null
),

vocabulary as (
    select
        concept_id,
        vocabulary_id,
        concept_code
    from concept
),

resolved as (
    select
        vocabulary.concept_id,
        min(codelist.ordinal) as ordinal
    from codelist
    inner join vocabulary
        on vocabulary.vocabulary_id = codelist.vocabulary_id
        and vocabulary.concept_code = codelist.concept_code
    group by vocabulary.concept_id
),

final as (
    select
        concept_id,
        ordinal
    from resolved
)

select
    concept_id,
    ordinal
from final
