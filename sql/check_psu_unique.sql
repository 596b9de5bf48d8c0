-- psu-in-several-strata: with psu_ids = "unique", a PSU id must belong to one stratum only.
with spread as (
    select wb_text({{ psu|ident }}) as psu
    from {{ raw|ident }}
    where not wb_blank({{ psu|ident }}) and not wb_blank({{ strata|ident }})
    group by all
    having count(distinct wb_text({{ strata|ident }})) > 1
)
select
    $column as col,
    min(s.psu) as value,
    count(*) as n,
    min(wb_text(r.{{ id|ident }}), 5) as examples,
    cast(count(distinct s.psu) as varchar) as detail
from {{ raw|ident }} as r
join spread as s on s.psu = wb_text(r.{{ psu|ident }})
having count(*) > 0
