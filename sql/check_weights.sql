-- bad-design-weight: base weights <= 0; selection probabilities <= 0 or > 1.
with long as (
    from (
        select {{ id|ident }} as "__wavebook_id"{% for c in columns %}, {{ c|ident }}{% endfor %}
        from {{ raw|ident }}
    ) unpivot (val for col in ({% for c in columns %}{{ c|ident }}{% if not loop.last %}, {% endif %}{% endfor %}))
),
judged as (
    select l."__wavebook_id" as id, l.col, k.weight_role as role, wb_number(l.val) as x
    from long as l
    join wb_columns as k on k.col = l.col
)
select
    col,
    null as value,
    count(*) as n,
    min(id, 5) as examples,
    'lowest ' || cast(min(x) as varchar) || ', highest ' || cast(max(x) as varchar) as detail
from judged
where (role = 'weight' and x <= 0) or (role = 'probability' and (x <= 0 or x > 1))
group by col
order by col
