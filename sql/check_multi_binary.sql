-- multi-not-binary: items of a multiple-response set hold 1 (selected), 0 (not) or nothing (not asked).
select v.col, wb_text(v.val) as value, cast(sum(v.n) as bigint) as n, [] as examples, null as detail, list(v.val) as spellings
from wb_values as v
join wb_columns as k on k.col = v.col
where k.is_item and wb_code(v.val) not in ('0', '1') and wb_text(v.val) is not null
group by v.col, wb_text(v.val)
order by v.col, value
