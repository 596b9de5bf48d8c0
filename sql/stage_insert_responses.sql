-- The raw text rows of a wave, typed per the codebook, into responses (columns matched by name).
-- Text is trimmed (empty -> NULL); numbers and codes are read with wb_number.
insert into responses by name
select
    $wave as wave,
    wb_text({{ id|ident }}) as respondent_id
    {%- for c in columns %},
    {% if c.type == "VARCHAR" -%}
    wb_text({{ c.name|ident }})
    {%- elif c.type == "DOUBLE" -%}
    wb_number({{ c.name|ident }})
    {%- else -%}
    cast(wb_number({{ c.name|ident }}) as {{ c.type }})
    {%- endif %} as {{ c.name|ident }}
    {%- endfor %}
from {{ raw|ident }}
