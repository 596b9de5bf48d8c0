-- code-gone: a code seen in an earlier wave ($waves, in spec order) that no respondent has now
-- (only for columns answered in this wave). detail = the last wave that had it.
with seen as (
    select col, code, cast(sum(n) as bigint) as n, arg_max(wave, list_position($waves, wave)) as last_wave
    from wb_previous
    group by col, code
)
select s.col, s.code as value, s.n, [] as examples, s.last_wave as detail
from seen as s
anti join wb_current as c on c.col = s.col and c.code = s.code
where s.col in (select col from wb_current)
order by s.col, s.code
