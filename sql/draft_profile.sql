-- One row per non-empty column of a raw table, for drafting a spec: counts, numeric shape and,
-- when there are at most $max_codes distinct values, the distinct (trimmed) values.
with long as (
    select col, wb_text(val) as val
    from (
        select {% for c in columns %}{{ c|ident }}{% if not loop.last %}, {% endif %}{% endfor %}
        from {{ raw|ident }}
    ) unpivot (val for col in ({% for c in columns %}{{ c|ident }}{% if not loop.last %}, {% endif %}{% endfor %}))
    where wb_text(val) is not null
)
select
    col,
    count(*) as n,
    count(distinct val) as distinct_values,
    count(*) filter (where wb_number(val) is null) as non_numbers,
    count(*) filter (where wb_number(val) <> trunc(wb_number(val))) as fractions,
    min(wb_number(val)) as lowest,
    max(wb_number(val)) as highest,
    case when count(distinct val) <= $max_codes then list(distinct val) end as codes
from long
group by col
