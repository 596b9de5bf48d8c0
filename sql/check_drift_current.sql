-- The distribution of this wave's codes (single/scale codes and multi items), for the drift checks.
create or replace temp table wb_current as
select v.col, case when k.int_coded then wb_code(v.val) else wb_text(v.val) end as code, cast(sum(v.n) as bigint) as n
from wb_values as v
join wb_columns as k on k.col = v.col
where wb_text(v.val) is not null
group by all
