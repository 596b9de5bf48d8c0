{#- Macro shared by the load_* files for typed sources: every column as text. Whole floats become
    integer text ('3.0' -> '3') so CSV and Parquet stage the same codes; NaN becomes NULL.
    columns: list of {name, kind} with kind "text", "float" or "other". -#}
{% macro text_columns(columns) -%}
    {%- for c in columns %}
    {% if c.kind == "text" -%}
    {{ c.name|ident }}
    {%- elif c.kind == "float" -%}
    case
        when {{ c.name|ident }} is null or isnan({{ c.name|ident }}) then null
        when {{ c.name|ident }} = trunc({{ c.name|ident }}) and abs({{ c.name|ident }}) < 1e15
            then cast(cast({{ c.name|ident }} as bigint) as varchar)
        else cast({{ c.name|ident }} as varchar)
    end
    {%- else -%}
    cast({{ c.name|ident }} as varchar)
    {%- endif %} as {{ c.name|ident }}{% if not loop.last %},{% endif %}
    {%- endfor %}
{%- endmacro %}
