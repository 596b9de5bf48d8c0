-- Staged respondents, one row per (wave, respondent_id); the study's own columns follow.
create table if not exists responses (
    wave varchar not null,
    respondent_id varchar not null
    {%- for c in columns %},
    {{ c.name|ident }} {{ c.type }}
    {%- endfor %}
)
