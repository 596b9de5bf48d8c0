-- missing-id: rows whose respondent id is empty; examples are data row numbers (1 = first data row).
select
    $column as col,
    null as value,
    count(*) as n,
    min(rowid + 1, 5) as examples,
    null as detail
from {{ raw|ident }}
where wb_text({{ id|ident }}) is null
having count(*) > 0
