-- Unweighted counts of each answer code of single-choice and scale variables, per wave.
-- One grouped pass: the variables are unpivoted to (wave, variable, code) and counted together.
-- Codes are compared as text so integer and text codebooks share one query; a missing answer
-- produces no row (the caller derives "no answer" from the wave's respondent count).
-- Identifiers: columns (the variables' column names), source (the routed responses view, pipeline.staging.routing). Bound: $waves VARCHAR[].
with answers as (
    select
        wave,
        {%- for column in columns %}
        cast({{ column | ident }} as VARCHAR) as {{ column | ident }}{{ "," if not loop.last }}
        {%- endfor %}
    from {{ source | ident }}
    where wave in (select unnest($waves::VARCHAR[]))
),

answers_long as (
    unpivot answers
    on {{ columns | map("ident") | join(", ") }}
    into name variable value code
)

select wave, variable, code, count(*)::BIGINT as count
from answers_long
group by wave, variable, code
