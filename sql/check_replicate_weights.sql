-- bad-replicate-weight / negative-replicate-weight: supplied replicate-weight values that are missing,
-- not finite numbers, or negative; per column and kind: rows, the first row, its value, example ids.
-- One filtered pass per column.
{% for c in columns -%}
select
    $names[{{ loop.index }}] as col,
    case
        when wb_text({{ c|ident }}) is null then 'missing'
        when wb_number({{ c|ident }}) is null then 'not-a-number'
        else 'negative'
    end as kind,
    count(*) as n,
    min(rowid) as first_row,
    arg_min(wb_text({{ c|ident }}), rowid) as value,
    min(wb_text({{ id|ident }}), 5) as examples
from {{ raw|ident }}
where wb_text({{ c|ident }}) is null
    or wb_number({{ c|ident }}) is null
    or wb_number({{ c|ident }}) < 0
group by kind
{% if not loop.last %}union all
{% endif %}
{%- endfor %}
order by col, kind
