-- missing-design-value: empty strata, PSU, base weight or selection probability.
{% for c in columns -%}
select
    $names[{{ loop.index }}] as col,
    null as value,
    count(*) as n,
    min(wb_text({{ id|ident }}), 5) as examples,
    null as detail
from {{ raw|ident }}
where wb_blank({{ c|ident }})
having count(*) > 0
{% if not loop.last %}union all
{% endif %}
{%- endfor %}
order by col
