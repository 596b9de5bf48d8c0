-- psu-in-several-strata: with psu_ids = "unique", a PSU id must belong to one stratum only.
with spread as (
    select {{ psu|ident }} as psu
    from {{ raw|ident }}
    where {{ psu|ident }} is not null and {{ strata|ident }} is not null
    group by all
    having count(distinct {{ strata|ident }}) > 1
)
select
    $column as col,
    min(s.psu) as value,
    count(*) as n,
    min(r.{{ id|ident }}, 5) as examples,
    cast(count(distinct s.psu) as varchar) as detail
from {{ raw|ident }} as r
join spread as s on s.psu = r.{{ psu|ident }}
having count(*) > 0
