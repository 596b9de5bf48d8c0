-- bad-design-weight: base weights <= 0; selection probabilities <= 0 or > 1.
{% for c in columns -%}
select
    $names[{{ loop.index }}] as col,
    null as value,
    count(*) as n,
    min(wb_text({{ id|ident }}), 5) as examples,
    'lowest ' || cast(min(wb_number({{ c.name|ident }})) as varchar)
        || ', highest ' || cast(max(wb_number({{ c.name|ident }})) as varchar) as detail
from {{ raw|ident }}
where wb_number({{ c.name|ident }}) <= 0
    {%- if c.probability %} or wb_number({{ c.name|ident }}) > 1{% endif %}
having count(*) > 0
{% if not loop.last %}union all
{% endif %}
{%- endfor %}
order by col
