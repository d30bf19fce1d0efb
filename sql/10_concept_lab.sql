-- 10_concept_lab: lab concepts of the DKA analytes.
-- grain:  one row per lab concept_id (and its analyte and specimen)
-- inputs: dka_codelist_lab (labs.csv), concept (CDM vocabulary)
-- output: dka_concept_lab (concept_id, analyte, specimen)
-- Codes resolve by (vocabulary_id, concept_code); no concept_id is written here.
with

codelist as (
    select
        vocabulary_id,
        concept_code,
        analyte,
        specimen
    from dka_codelist_lab
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
        codelist.analyte,
        codelist.specimen
    from codelist
    inner join vocabulary
        on vocabulary.vocabulary_id = codelist.vocabulary_id
        and vocabulary.concept_code = codelist.concept_code
),

final as (
    select
        concept_id,
        analyte,
        specimen
    from resolved
)

select
    concept_id,
    analyte,
    specimen
from final
