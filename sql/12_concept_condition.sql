-- 12_concept_condition: condition concepts of DKA and of each diabetes type.
-- grain:  one row per (concept_id, concept_group)
-- inputs: dka_codelist_condition (conditions.csv), concept (CDM vocabulary)
-- output: dka_concept_condition (concept_id, concept_group)
-- match = exact: the code itself; match = prefix: every code of the vocabulary that starts with
-- it (E10 -> E10, E10.1, E10.10, ...). Both ICD-10-CM (source) and SNOMED (standard) concepts
-- are listed: recipes match condition_concept_id and condition_source_concept_id.
with

codelist as (
    select
        vocabulary_id,
        concept_code,
        match,
        concept_group
    from dka_codelist_condition
),

vocabulary as (
    select
        concept_id,
        vocabulary_id,
        concept_code
    from concept
),

exact_codes as (
    select
        vocabulary.concept_id,
        codelist.concept_group
    from codelist
    inner join vocabulary
        on vocabulary.vocabulary_id = codelist.vocabulary_id
        and vocabulary.concept_code = codelist.concept_code
    where codelist.match = 'exact'
),

prefix_codes as (
    select
        vocabulary.concept_id,
        codelist.concept_group
    from codelist
    inner join vocabulary
        on vocabulary.vocabulary_id = codelist.vocabulary_id
        and substr(vocabulary.concept_code, 1, length(codelist.concept_code)) = codelist.concept_code
    where codelist.match = 'prefix'
),

combined as (
    select concept_id, concept_group from exact_codes
    union
    select concept_id, concept_group from prefix_codes
),

final as (
    select
        concept_id,
        concept_group
    from combined
)

select
    concept_id,
    concept_group
from final
