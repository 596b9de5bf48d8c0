-- The raw rows of a wave, typed per the codebook, into responses (columns matched by name).
-- Text is trimmed (empty -> NULL); numbers and codes are read with wb_number, or taken as they
-- are from a column read typed (c.typed: DOUBLE, finite and whole where the reader kept it typed).
-- With `strict` (staging straight from the file, before the checks), a value that would not be
-- stored as the checks read it (not a finite number; a fraction in an integer column) fails the
-- insert instead.
insert into responses by name
select
    $wave as wave,
    wb_text({{ id|ident }}) as respondent_id
    {%- for c in columns %},
    {% set v = c.name|ident -%}
    {% if c.type == "VARCHAR" -%}
    wb_text({{ v }})
    {%- elif c.typed and strict and c.type == "DOUBLE" -%}
    case when isfinite({{ v }}) or {{ v }} is null then {{ v }} else error('wavebook: not finite') end
    {%- elif c.typed and strict -%}
    case when {{ v }} = trunc({{ v }}) or {{ v }} is null then cast({{ v }} as {{ c.type }}) else error('wavebook: not whole') end
    {%- elif c.typed -%}
    cast({{ v }} as {{ c.type }})
    {%- elif strict -%}
    case
        when wb_blank({{ v }}) then null
        when wb_number({{ v }}) is not null
            {%- if c.type != "DOUBLE" %} and wb_number({{ v }}) = trunc(wb_number({{ v }})){% endif %}
            then cast(wb_number({{ v }}) as {{ c.type }})
        else error('wavebook: a value to check as written')
    end
    {%- elif c.type == "DOUBLE" -%}
    wb_number({{ v }})
    {%- else -%}
    cast(wb_number({{ v }}) as {{ c.type }})
    {%- endif %} as {{ v }}
    {%- endfor %}
from {{ raw|ident }}
