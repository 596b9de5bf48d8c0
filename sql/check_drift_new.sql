-- code-new: a valid code that appears now but in no earlier staged wave (for columns answered
-- before), when its share of this wave's answers is at least $min_share.
with shares as (
    select col, code, n, n / sum(n) over (partition by col) as share
    from wb_current
)
select c.col, c.code as value, c.n, [] as examples, null as detail
from shares as c
semi join wb_allowed as a on a.col = c.col and a.code = c.code
anti join wb_previous as p on p.col = c.col and p.code = c.code
where c.col in (select col from wb_previous) and c.share >= $min_share
order by c.col, c.code
