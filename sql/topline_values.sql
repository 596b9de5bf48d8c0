-- Unweighted summary statistics of numeric and scale variables, per wave: the number of
-- answers, the number of values used, mean, median (quantile_cont: the midpoint of the two middle values when n is even),
-- minimum and maximum. Codes excluded from the mean (e.g. "don't know") are left out.
-- Identifiers: columns, source (the routed responses view, pipeline.staging.routing). Bound: $waves VARCHAR[]; $excluded_variable VARCHAR[] and
-- $excluded_value DOUBLE[] (parallel lists: variable name, excluded code).
with exclusions as (
    select distinct variable, value
    from (
        select
            unnest($excluded_variable::VARCHAR[]) as variable,
            unnest($excluded_value::DOUBLE[]) as value
    )
),

answers as (
    select
        wave,
        {%- for column in columns %}
        cast({{ column | ident }} as DOUBLE) as {{ column | ident }}{{ "," if not loop.last }}
        {%- endfor %}
    from {{ source | ident }}
    where wave in (select unnest($waves::VARCHAR[]))
),

answers_long as (
    unpivot answers
    on {{ columns | map("ident") | join(", ") }}
    into name variable value value
),

flagged as (
    select a.wave, a.variable, a.value, e.variable is not null as excluded
    from answers_long as a
    left join exclusions as e
        on e.variable = a.variable and e.value = a.value
)

select
    wave,
    variable,
    count(*)::BIGINT as answered,
    count(*) filter (where not excluded)::BIGINT as n,
    avg(value) filter (where not excluded) as mean,
    median(value) filter (where not excluded) as median,
    min(value) filter (where not excluded) as min,
    max(value) filter (where not excluded) as max
from flagged
group by wave, variable
