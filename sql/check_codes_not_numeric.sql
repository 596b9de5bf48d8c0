-- not-a-number (integer-coded single/scale columns): values that are not numbers.
select v.col, wb_text(v.val) as value, cast(sum(v.n) as bigint) as n, [] as examples, null as detail, list(v.val) as spellings
from wb_values as v
join wb_columns as k on k.col = v.col
where k.int_coded and not k.is_item and wb_number(v.val) is null and wb_text(v.val) is not null
group by v.col, wb_text(v.val)
order by v.col, value
