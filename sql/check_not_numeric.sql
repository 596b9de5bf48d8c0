-- not-a-number (numeric variables, base weight, selection probability): values that are not
-- finite numbers. One filtered pass per column; the expensive test runs only on failing rows.
{% for c in columns -%}
select
    $names[{{ loop.index }}] as col,
    wb_text({{ c|ident }}) as value,
    count(*) as n,
    min(wb_text({{ id|ident }}), 5) as examples,
    null as detail
from {{ raw|ident }}
where not coalesce(isfinite(try_cast({{ c|ident }} as double)), false) and wb_text({{ c|ident }}) is not null
group by all
{% if not loop.last %}union all
{% endif %}
{%- endfor %}
order by col, value
