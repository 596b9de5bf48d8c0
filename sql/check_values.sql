-- wb_values: how often each raw value occurs in each coded column (single, scale, multi item);
-- blank values are kept here and skipped by the rules. val is the text as written, or the integer
-- code of a column read typed (wb_value).
-- One grouped pass per column; the code rules then work on this small table. $names lists the
-- column names in template order.
create or replace temp table wb_values as
{% for c in columns -%}
select $names[{{ loop.index }}] as col, wb_value({{ c|ident }}) as val, count(*) as n
from {{ raw|ident }}
where {{ c|ident }} is not null
group by {{ c|ident }}
{% if not loop.last %}union all
{% endif %}
{%- endfor %}
