-- Unweighted counts for multiple-response sets, per wave.
-- level 'item': per item column, respondents with an answer (0 or 1) and respondents who selected it.
-- level 'set': per set, respondents asked (at least one item answered) and respondents who
-- selected any item (list_max ignores missing items). Missing items are never counted as "no".
-- Identifiers: items (every item column), sets (list of {name, items}), source (the routed responses view, pipeline.staging.routing). Bound: $waves VARCHAR[].
with items as (
    select
        wave,
        {%- for column in items %}
        cast({{ column | ident }} as INTEGER) as {{ column | ident }}{{ "," if not loop.last }}
        {%- endfor %}
    from {{ source | ident }}
    where wave in (select unnest($waves::VARCHAR[]))
),

items_long as (
    unpivot items
    on {{ items | map("ident") | join(", ") }}
    into name variable value selected
),

sets as (
    select
        wave,
        {%- for set in sets %}
        list_max([
            {%- for column in set["items"] %}cast({{ column | ident }} as INTEGER){{ ", " if not loop.last }}{% endfor -%}
        ]) as {{ set["name"] | ident }}{{ "," if not loop.last }}
        {%- endfor %}
    from {{ source | ident }}
    where wave in (select unnest($waves::VARCHAR[]))
),

sets_long as (
    unpivot sets
    on {{ sets | map(attribute="name") | map("ident") | join(", ") }}
    into name variable value selected
)

select 'item' as level, wave, variable, count(*)::BIGINT as answered, sum(selected)::BIGINT as selected
from items_long
group by wave, variable

union all

select 'set' as level, wave, variable, count(*)::BIGINT as answered, sum(selected)::BIGINT as selected
from sets_long
group by wave, variable
