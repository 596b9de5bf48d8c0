-- population-too-small: a stratum samples more first-stage units (PSUs, or respondents without PSUs)
-- than design.population says it holds. value = stratum code, n = units sampled, detail = population.
with sampled as (
    select
        {% if not strata %}null{% elif int_keys %}wb_code(wb_text({{ strata|ident }})){% else %}wb_text({{ strata|ident }}){% endif %} as stratum,
        count(distinct wb_text({{ unit|ident }})) as units
    from {{ raw|ident }}
    group by all
)
select
    $column as col,
    s.stratum as value,
    s.units as n,
    [] as examples,
    cast(p.size as varchar) as detail
from sampled as s
join wb_strata as p on {% if strata %}p.code = s.stratum{% else %}true{% endif %}
where s.units > p.size
order by s.stratum
