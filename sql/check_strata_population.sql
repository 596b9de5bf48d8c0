-- stratum-without-population: strata in the data with no design.population / sampling_fraction entry.
select
    $column as col,
    r.stratum as value,
    count(*) as n,
    min(r.id, 5) as examples,
    null as detail
from (
    select
        {% if int_keys %}wb_code(wb_text({{ strata|ident }})){% else %}wb_text({{ strata|ident }}){% endif %} as stratum,
        wb_text({{ id|ident }}) as id
    from {{ raw|ident }}
    where not wb_blank({{ strata|ident }})
) as r
anti join wb_strata as p on p.code = r.stratum
group by r.stratum
order by r.stratum
