-- The distribution of the same columns in the earlier staged waves ($waves), for the drift checks.
create or replace temp table wb_previous as
select wave, col, code, count(*) as n
from (
    select wave{% for c in columns %}, cast({{ c|ident }} as varchar) as {{ c|ident }}{% endfor %}
    from responses
    where list_contains($waves, wave)
) unpivot (code for col in ({% for c in columns %}{{ c|ident }}{% if not loop.last %}, {% endif %}{% endfor %}))
group by all
