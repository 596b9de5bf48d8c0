-- code-gone: a code seen in an earlier wave ($waves, in spec order) that no respondent has now
-- (only for columns answered in this wave), when its share of the answers in the last wave that
-- had it was at least $min_share. detail = that wave.
with totals as (
    select wave, col, sum(n) as total
    from wb_previous
    group by all
),
seen as (
    select
        p.col,
        p.code,
        cast(sum(p.n) as bigint) as n,
        arg_max(p.wave, list_position($waves, p.wave)) as last_wave,
        arg_max(p.n / t.total, list_position($waves, p.wave)) as last_share
    from wb_previous as p
    join totals as t on t.wave = p.wave and t.col = p.col
    group by p.col, p.code
)
select s.col, s.code as value, s.n, [] as examples, s.last_wave as detail
from seen as s
anti join wb_current as c on c.col = s.col and c.code = s.code
where s.col in (select col from wb_current) and s.last_share >= $min_share
order by s.col, s.code
