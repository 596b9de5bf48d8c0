-- duplicate-id: respondent ids on more than one row; n counts the rows, detail the distinct ids.
with repeated as (
    select wb_text({{ id|ident }}) as id, count(*) as n
    from {{ raw|ident }}
    where wb_text({{ id|ident }}) is not null
    group by all
    having count(*) > 1
)
select
    $column as col,
    null as value,
    cast(sum(n) as bigint) as n,
    min(id, 5) as examples,
    cast(count(*) as varchar) as detail
from repeated
having count(*) > 0
