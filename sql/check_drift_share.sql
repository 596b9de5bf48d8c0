-- share-shift: a code's unweighted share of the answers moved by more than $threshold since the
-- latest earlier staged wave ($last). For multi items only the share of 1s is compared.
with previous as (
    select col, code, n / sum(n) over (partition by col) as share
    from wb_previous
    where wave = $last
),
current as (
    select col, code, n, n / sum(n) over (partition by col) as share
    from wb_current
),
paired as (
    select
        coalesce(c.col, p.col) as col,
        coalesce(c.code, p.code) as code,
        coalesce(c.n, 0) as n,
        coalesce(p.share, 0) as before,
        coalesce(c.share, 0) as after
    from current as c
    full join previous as p on p.col = c.col and p.code = c.code
)
select
    x.col,
    x.code as value,
    x.n,
    [] as examples,
    printf('%.1f%% in %s, %.1f%% now', 100 * x.before, $last, 100 * x.after) as detail
from paired as x
join wb_columns as k on k.col = x.col
where abs(x.after - x.before) > $threshold
    and x.col in (select col from current)
    and x.col in (select col from previous)
    and not (k.is_item and x.code = '0')
order by x.col, x.code
