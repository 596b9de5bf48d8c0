-- Respondents asked each routed variable (or multi item with its own waves), per wave.
-- Identifiers: source (the routed responses view), flags (its asked-flag columns).
-- Bound: $waves VARCHAR[].
with flags_long as (
    unpivot (
        select wave, {{ flags | map("ident") | join(", ") }}
        from {{ source | ident }}
        where wave in (select unnest($waves::VARCHAR[]))
    )
    on {{ flags | map("ident") | join(", ") }}
    into name flag value asked
)

select wave, flag, count(*) filter (where asked)::BIGINT as asked
from flags_long
group by wave, flag
