-- out-of-bounds: numeric values below the declared minimum or above the declared maximum;
-- value is 'below' or 'above', detail the most extreme value found.
with long as (
    from (
        select {{ id|ident }} as "__wavebook_id"{% for c in columns %}, {{ c|ident }}{% endfor %}
        from {{ raw|ident }}
    ) unpivot (val for col in ({% for c in columns %}{{ c|ident }}{% if not loop.last %}, {% endif %}{% endfor %}))
),
judged as (
    select l."__wavebook_id" as id, l.col, wb_number(l.val) as x, k.minimum, k.maximum
    from long as l
    join wb_columns as k on k.col = l.col
)
select col, 'below' as value, count(*) as n, min(id, 5) as examples, cast(min(x) as varchar) as detail
from judged
where x < minimum
group by col
union all
select col, 'above' as value, count(*) as n, min(id, 5) as examples, cast(max(x) as varchar) as detail
from judged
where x > maximum
group by col
order by col, value
