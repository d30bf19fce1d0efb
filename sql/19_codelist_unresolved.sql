-- 19_codelist_unresolved: code-list lines whose code the extract's vocabulary does not hold.
-- grain:  one row per unresolved code-list line
-- inputs: dka_codelist_lab, _unit, _ketone, _condition, _drug, _route, _visit; concept
-- output: dka_codelist_unresolved (codelist, line, vocabulary_id, concept_code, description)
-- Not an error: a vocabulary subset may lack codes nobody uses. Prefix lines are unresolved when
-- no code starts with the prefix; unit lines for "none" need no concept.
with

vocabulary as (
    select
        concept_id,
        vocabulary_id,
        concept_code
    from concept
),

listed as (
    select 'labs.csv' as codelist, line, vocabulary_id, concept_code, description, 'exact' as match
    from dka_codelist_lab
    union all
    select 'units.csv' as codelist, line, vocabulary_id, concept_code, analyte as description, 'exact' as match
    from dka_codelist_unit
    where vocabulary_id = 'UCUM'
    union all
    select 'ketone_ordinals.csv' as codelist, line, vocabulary_id, concept_code, text as description, 'exact' as match
    from dka_codelist_ketone
    where concept_code is not null
    union all
    select 'conditions.csv' as codelist, line, vocabulary_id, concept_code, description, match
    from dka_codelist_condition
    union all
    select 'drugs.csv' as codelist, line, vocabulary_id, concept_code, description, 'exact' as match
    from dka_codelist_drug
    union all
    select 'routes.csv' as codelist, line, vocabulary_id, concept_code, description, 'exact' as match
    from dka_codelist_route
    union all
    select 'visits.csv' as codelist, line, vocabulary_id, concept_code, description, 'exact' as match
    from dka_codelist_visit
),

exact_hits as (
    select distinct
        listed.codelist,
        listed.line
    from listed
    inner join vocabulary
        on vocabulary.vocabulary_id = listed.vocabulary_id
        and vocabulary.concept_code = listed.concept_code
    where listed.match = 'exact'
),

prefix_hits as (
    select distinct
        listed.codelist,
        listed.line
    from listed
    inner join vocabulary
        on vocabulary.vocabulary_id = listed.vocabulary_id
        and substr(vocabulary.concept_code, 1, length(listed.concept_code)) = listed.concept_code
    where listed.match = 'prefix'
),

hits as (
    select codelist, line from exact_hits
    union
    select codelist, line from prefix_hits
),

final as (
    select
        listed.codelist,
        listed.line,
        listed.vocabulary_id,
        listed.concept_code,
        listed.description
    from listed
    left join hits
        on hits.codelist = listed.codelist
        and hits.line = listed.line
    where hits.line is null
)

select
    codelist,
    line,
    vocabulary_id,
    concept_code,
    description
from final
order by codelist, line
