-- The distribution of the same columns in the earlier staged waves ($waves), one grouped pass per column.
create or replace temp table wb_previous as
{% for c in columns -%}
select wave, $names[{{ loop.index }}] as col, cast({{ c|ident }} as varchar) as code, count(*) as n
from responses
where list_contains($waves, wave) and {{ c|ident }} is not null
group by wave, {{ c|ident }}
{% if not loop.last %}union all
{% endif %}
{%- endfor %}
