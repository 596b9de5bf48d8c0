-- Which typed (DOUBLE) columns of a raw table hold a value whose spelling the checks must see as
-- written, so pipeline.staging.readers reads them again as text: one pass, every column at once.
-- columns: list of {name, kind}; kind "number" flags values that are not finite; "code" also
-- fractions and whole numbers too large for integer codes (|x| >= 1e15, as wb_code); "item"
-- anything but 0 and 1.
select
    {%- for c in columns %}
    coalesce(bool_or(
        {%- if c.kind == "item" %} {{ c.name|ident }} not in (0, 1)
        {%- elif c.kind == "code" %} not isfinite({{ c.name|ident }}) or {{ c.name|ident }} <> trunc({{ c.name|ident }})
            or abs({{ c.name|ident }}) >= 1e15
        {%- else %} not isfinite({{ c.name|ident }})
        {%- endif %}), false) as {{ ("c" ~ loop.index)|ident }}{% if not loop.last %},{% endif %}
    {%- endfor %}
from {{ table|ident }}
