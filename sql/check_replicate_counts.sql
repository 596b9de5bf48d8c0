-- Supplied replicate weights, one pass over the wave: per column, the rows whose value is not a finite
-- number >= 0 (empty, text, inf and nan included: nan sorts above every number in DuckDB);
-- check_replicate_weights.sql then details the failing columns.
select
{%- for c in columns %}
    count(*) filter (where not coalesce(
        try_cast({{ c|ident }} as double) between 0 and 1.7976931348623157e308, false)) as bad_{{ loop.index }}
    {%- if not loop.last %},{% endif %}
{%- endfor %}
from {{ raw|ident }}
