-- missing-design-value: empty strata, PSU, base weight or selection probability.
with long as (
    from (
        select {{ id|ident }} as "__wavebook_id"{% for c in columns %}, {{ c|ident }}{% endfor %}
        from {{ raw|ident }}
    ) unpivot include nulls (val for col in ({% for c in columns %}{{ c|ident }}{% if not loop.last %}, {% endif %}{% endfor %}))
)
select col, null as value, count(*) as n, min("__wavebook_id", 5) as examples, null as detail
from long
where val is null
group by col
order by col
