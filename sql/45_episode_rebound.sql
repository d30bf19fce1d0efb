-- 45_episode_rebound: episodes after whose end the diagnostic criteria are met again within the
-- rebound window.
-- grain:  one row per episode of dka_episode_chain
-- inputs: dka_episode_chain (the rows of 44_episode_step, all steps), dka_onset_candidates (sql/40)
-- output: dka_episode_rebound (person_id, onset_datetime, is_rebound, rebound_datetime)
-- slots:  rebound_hours
--
-- A rebound is a time point meeting the diagnosis after the episode's end and no later than
-- rebound_hours after it (rebound_hours <= episode_gap_hours, so it never starts a new episode).
-- The window opens at end_datetime whatever the end reason (a person discharged unresolved who
-- meets the criteria again the next morning has rebounded as well); an episode ending in death
-- has no later time points.

with

episodes as (
    select
        dka_episode_chain.person_id,
        dka_episode_chain.onset_datetime,
        dka_episode_chain.end_datetime
    from dka_episode_chain
),

candidates as (
    select
        dka_onset_candidates.person_id,
        dka_onset_candidates.onset_datetime as candidate_datetime
    from dka_onset_candidates
),

rebounds as (
    select
        episodes.person_id,
        episodes.onset_datetime,
        min(candidates.candidate_datetime) as rebound_datetime
    from episodes
    inner join candidates
        on candidates.person_id = episodes.person_id
        and candidates.candidate_datetime > episodes.end_datetime
        and candidates.candidate_datetime <= episodes.end_datetime + interval '1 hour' * {{ rebound_hours }}
    group by episodes.person_id, episodes.onset_datetime
),

final as (
    select
        episodes.person_id,
        episodes.onset_datetime,
        rebounds.rebound_datetime is not null as is_rebound,
        rebounds.rebound_datetime
    from episodes
    left join rebounds
        on rebounds.person_id = episodes.person_id
        and rebounds.onset_datetime = episodes.onset_datetime
)

select
    final.person_id,
    final.onset_datetime,
    final.is_rebound,
    final.rebound_datetime
from final
