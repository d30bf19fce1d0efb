-- 13_concept_drug: drug concepts of each class: the listed RxNorm ingredients and every
-- descendant through concept_ancestor (an empty view when the extract has no concept_ancestor).
-- grain:  one row per (concept_id, drug_class)
-- inputs: dka_codelist_drug (drugs.csv), concept, concept_ancestor (CDM vocabulary)
-- output: dka_concept_drug (concept_id, drug_class)
with

codelist as (
    select
        vocabulary_id,
        concept_code,
        drug_class
    from dka_codelist_drug
),

vocabulary as (
    select
        concept_id,
        vocabulary_id,
        concept_code
    from concept
),

ancestry as (
    select
        ancestor_concept_id,
        descendant_concept_id
    from concept_ancestor
),

ingredients as (
    select
        vocabulary.concept_id,
        codelist.drug_class
    from codelist
    inner join vocabulary
        on vocabulary.vocabulary_id = codelist.vocabulary_id
        and vocabulary.concept_code = codelist.concept_code
),

descendants as (
    select
        ancestry.descendant_concept_id as concept_id,
        ingredients.drug_class
    from ingredients
    inner join ancestry
        on ancestry.ancestor_concept_id = ingredients.concept_id
),

combined as (
    select concept_id, drug_class from ingredients
    union
    select concept_id, drug_class from descendants
),

final as (
    select
        concept_id,
        drug_class
    from combined
)

select
    concept_id,
    drug_class
from final
