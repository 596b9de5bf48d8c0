-- Up to five example respondent ids for each problem found on wb_values: wb_bad holds
-- (key, col, val) for every raw spelling of a bad value; one pass per column involved.
{% for c in columns -%}
select b.key, min(wb_text(r.{{ id|ident }}), 5) as examples
from {{ raw|ident }} as r
join wb_bad as b on b.col = $names[{{ loop.index }}] and b.val = wb_value(r.{{ c|ident }})
group by b.key
{% if not loop.last %}union all
{% endif %}
{%- endfor %}
