-- out-of-bounds: numeric values below the declared minimum ($minimum[i]) or above the declared
-- maximum ($maximum[i]); value is 'below' or 'above', detail the most extreme value found.
-- A missing bound is passed as -inf / +inf.
{% for c in columns -%}
select
    $names[{{ loop.index }}] as col,
    'below' as value,
    count(*) as n,
    min(wb_text({{ id|ident }}), 5) as examples,
    cast(min(wb_number({{ c|ident }})) as varchar) as detail
from {{ raw|ident }}
where wb_number({{ c|ident }}) < $minimum[{{ loop.index }}]
having count(*) > 0
union all
select
    $names[{{ loop.index }}] as col,
    'above' as value,
    count(*) as n,
    min(wb_text({{ id|ident }}), 5) as examples,
    cast(max(wb_number({{ c|ident }})) as varchar) as detail
from {{ raw|ident }}
where wb_number({{ c|ident }}) > $maximum[{{ loop.index }}]
having count(*) > 0
{% if not loop.last %}union all
{% endif %}
{%- endfor %}
order by col, value
